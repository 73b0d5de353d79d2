"""Cost-to-go maps: each body's time to its goal, by graph search over the free space.

For one body and one goal, :func:`cost_to_go` builds the free-space grid graph of that body
(:func:`fieldplan.routes.occupancy_graph`: 8-neighbour cells whose connecting segment stays clear of
walls and obstacles), weighs each *directed* edge by its length over the speed the actuator can give
that body along it (:func:`fieldplan.routes.available_speed`, the body alone, every input at its
best), and runs Dijkstra's algorithm (``scipy.sparse.csgraph.dijkstra``) from the goal over the
reversed edges. The result is the time the fields need to bring the body home from every cell,
shortest over all paths around obstacles and through slow regions: the horizon planner's objective.

:class:`CostToGo` interpolates the map bilinearly (with its gradient) and turns it into the local
quadratic the horizon program minimises: near a point ``x0`` the squared time-to-go
``J(x)^2 / 2`` is approximated by ``|grad J|^2 |x - c|^2 / 2`` with the *virtual goal*
``c = x0 - J grad J / |grad J|^2``. The value and gradient at ``x0`` are exact (of the map), and in
open space with uniform speed ``v`` the approximation is exact: ``c`` is the goal and the weight
``1 / v^2``. Around an obstacle the virtual goal lies along the way round, so minimising it never
asks a body to go through a wall.

Examples
--------
>>> import numpy as np, fieldplan
>>> from fieldplan.testing import SourceArray
>>> act = SourceArray([[0, 0], [1e-3, 0], [1e-3, 1e-3], [0, 1e-3]], force=2e-12)
>>> ws = fieldplan.Workspace((0, 0, 1e-3, 1e-3))
>>> bead = fieldplan.Body("bead", radius=5e-6, density=1050.0)
>>> ctg = cost_to_go(ws, act, bead, [7e-4, 6e-4])
>>> bool(ctg.value([[3e-4, 3e-4]])[0] > ctg.value([[6e-4, 5e-4]])[0] > 0)
True
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import shapely
from scipy.ndimage import distance_transform_edt
from scipy.sparse.csgraph import dijkstra

from ..errors import WorkspaceError
from .routes import GRID_DIRECTIONS as _DIRECTIONS, available_speed, default_resolution, occupancy_graph, smooth_route

__all__ = ["CostToGo", "cost_to_go", "speed_table"]


def speed_table(graph, actuator, body, medium, floor=1e-3):
    """Available speed of ``body`` at every node of ``graph`` along the 8 grid directions, m/s.

    Parameters
    ----------
    graph : networkx.Graph
        From :func:`fieldplan.routes.occupancy_graph`.
    actuator : Actuator
    body : Body
    medium : Medium
    floor : float
        Speeds below ``floor`` times the fastest on the graph are raised to it, so a region the fields
        barely reach is expensive but not cut off (a dead zone is a long way, not a wall).

    Returns
    -------
    nodes : list
        Node keys, in the order of the rows below.
    xy : ndarray, shape (V, 2)
        Node positions, m.
    speed : ndarray, shape (V, 8)
        m/s, directions as ``fieldplan.routes._DIRECTIONS`` (east, then counter-clockwise).
    """
    nodes = list(graph.nodes)
    xy = np.array([graph.nodes[v]["xy"] for v in nodes], dtype=float).reshape(-1, 2)
    if not nodes:
        return nodes, xy, np.zeros((0, 8))
    basis = actuator.basis([body] * len(nodes), medium, xy)
    dirs = _DIRECTIONS / np.linalg.norm(_DIRECTIONS, axis=1, keepdims=True)
    speed = available_speed(basis, dirs)
    vmax = float(max(speed.max(), 1e-300))
    return nodes, xy, np.maximum(speed, floor * vmax)


class CostToGo:
    """One body's time-to-goal map, interpolated, with the local quadratic the planner minimises.

    Built by :func:`cost_to_go`; not usually made by hand.

    Parameters
    ----------
    xs, ys : ndarray
        Cell-centre coordinates of the grid, m.
    values : ndarray, shape (len(ys), len(xs))
        Time to goal at each cell centre, s; cells outside the free space hold an extrapolation that
        grows away from it (so the gradient points back in).
    reachable : ndarray of bool, same shape
        Cells of the free space from which the goal can be reached.
    goal : array_like, shape (2,)
        m.
    goal_speed : float
        Speed near the goal, m/s. The map recomputes it as the mean rate over the ring at ``near``
        (see :meth:`value_and_gradient`); the argument is the fallback for a one-cell grid.
    near : float
        Radius of the goal region, m: within it the map is the straight-line time
        ``|x - goal| / goal_speed`` (isotropic, so the planner's squared cost is exactly quadratic
        there), blended smoothly into the grid's values at ``near``.
    route : ndarray, shape (P, 2), optional
        The fastest path from the start the map was asked about, m (for plots and reports).
    """

    def __init__(self, xs, ys, values, reachable, goal, goal_speed, near, route=None):
        self.xs = np.asarray(xs, dtype=float)
        self.ys = np.asarray(ys, dtype=float)
        self.values = np.asarray(values, dtype=float)
        self.reachable = np.asarray(reachable, dtype=bool)
        self.goal = np.asarray(goal, dtype=float).reshape(2)
        self.goal_speed = float(goal_speed)
        self.near = float(near)
        self.route = route
        self.res = float(self.xs[1] - self.xs[0]) if len(self.xs) > 1 else 1.0
        if self.values.shape[0] >= 2 and self.values.shape[1] >= 2:
            # The isotropic rate of the goal region: the ring's *least* time / distance, so every
            # direction's remaining time can be made up in the blend band at a positive rate (the
            # map then rises along every ray: an earlier mean-rate blend dipped, and bodies stalled
            # on the dip in directions faster than the mean).
            a = np.linspace(0.0, 2.0 * np.pi, 64, endpoint=False)
            ring = self.goal + self.near * np.stack([np.cos(a), np.sin(a)], axis=1)
            rate = float(np.min(self._grid(ring)[0])) / self.near
            if np.isfinite(rate) and rate > 0:
                self.goal_speed = 1.0 / rate

    def _cells(self, xy):
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        fx = (xy[:, 0] - self.xs[0]) / self.res
        fy = (xy[:, 1] - self.ys[0]) / self.res
        nx_, ny = len(self.xs), len(self.ys)
        ix = np.clip(np.floor(fx).astype(int), 0, max(nx_ - 2, 0))
        iy = np.clip(np.floor(fy).astype(int), 0, max(ny - 2, 0))
        # Beyond the grid the map is extended linearly (fractions outside [0, 1]).
        return xy, ix, iy, fx - ix, fy - iy

    def _grid(self, xy):
        """Bilinear value (s) and gradient (s/m) of the grid at points ``xy`` (n, 2) m."""
        xy, ix, iy, a, b = self._cells(xy)
        V = self.values
        v00, v10 = V[iy, ix], V[iy, ix + 1]
        v01, v11 = V[iy + 1, ix], V[iy + 1, ix + 1]
        val = (1 - a) * (1 - b) * v00 + a * (1 - b) * v10 + (1 - a) * b * v01 + a * b * v11
        gx = ((1 - b) * (v10 - v00) + b * (v11 - v01)) / self.res
        gy = ((1 - a) * (v01 - v00) + a * (v11 - v10)) / self.res
        return val, np.stack([gx, gy], axis=1)

    def value_and_gradient(self, xy):
        """Time to goal (s) and its gradient (s/m) at points ``xy`` (n, 2) m.

        Bilinear in each grid cell. Within ``near`` of the goal, where the grid is too coarse to
        resolve the approach, the time along each ray ``g + r u`` is the integral of a rate that
        blends two speeds:

        - within ``r1 = near / 3`` one speed for all directions, ``goal_speed`` (the fastest on the
          ring): the time is ``r / goal_speed``, whose square is exactly the quadratic the horizon
          program minimises, so the final approach of many bodies at once is planned without
          linearisation error (a direction-dependent cone, curved at its apex, made the program
          trade one body's progress for another's on a false model);
        - from ``r1`` to ``near`` the rate moves (smoothstep in ``r``) to the direction's own, fixed
          so that the time at ``near`` equals the grid's there: the map is continuous across the ring
          (a jump there would be a barrier: bodies once stalled on it a few millimetres out) and rises
          along every ray (both rates are positive).

        Returns
        -------
        value : ndarray, shape (n,)
        gradient : ndarray, shape (n, 2)
        """
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        d = xy - self.goal
        dist = np.linalg.norm(d, axis=1)
        if self.values.shape[0] < 2 or self.values.shape[1] < 2:
            u = d / np.maximum(dist, 1e-300)[:, None]
            return dist / self.goal_speed, u / self.goal_speed
        val, grad = self._grid(xy)
        close = dist <= self.near
        if close.any():
            r = dist[close]
            u = np.where(r[:, None] > 0, d[close] / np.maximum(r, 1e-300)[:, None], 0.0)
            Jr, Gr = self._grid(self.goal + self.near * u)
            R, r1 = self.near, self.near / 3.0
            k0 = 1.0 / self.goal_speed                       # s/m, inner rate
            A = 0.5 * (R + r1)                               # integral of the blend weight over [0, R]
            k1 = (Jr - A * k0) / (R - A)                     # outer rate of this direction, >= k0
            t = np.clip((R - r) / (R - r1), 0.0, 1.0)
            w = t * t * (3.0 - 2.0 * t)                      # blend weight: 1 inside r1, 0 at the ring
            Wc = np.where(r <= r1, r, r1 + (R - r1) * (0.5 - t**3 + 0.5 * t**4))     # its integral to r
            val[close] = k0 * Wc + k1 * (r - Wc)
            # Radially the rate itself; across the ray k1 varies with u as J_grid does on the ring:
            # d k1 / dx = (I - u u^T) grad J_grid(ring) / (r (R - A) / R).
            tang = Gr - u * np.sum(u * Gr, axis=1, keepdims=True)
            with np.errstate(invalid="ignore", divide="ignore"):
                across = np.where(r[:, None] > 0, ((r - Wc) * R / ((R - A) * np.maximum(r, 1e-300)))[:, None] * tang, 0.0)
            grad[close] = u * (k0 * w + k1 * (1.0 - w))[:, None] + across
        return val, grad

    def value(self, xy):
        """Time to goal at points ``xy`` (n, 2) m, s, shape (n,)."""
        return self.value_and_gradient(xy)[0]

    def quadratic(self, xy, offset=0.0):
        """Local model of ``max(J - offset, 0)^2 / 2`` at ``xy``: weights (s/m)^2 and virtual goals (m).

        ``max(J - offset, 0)^2 / 2 ~ weight * |x - centre|^2 / 2`` near each point, with the value
        and gradient matched exactly. With ``offset = 0`` the centre near the goal is the goal itself;
        with an offset (s) the cost vanishes within that time of the goal (a dead zone), and the
        centre is the nearest point of the dead zone's edge.

        Parameters
        ----------
        xy : ndarray, shape (n, 2)
            m.
        offset : float or ndarray, shape (n,)
            s.

        Returns
        -------
        weight : ndarray, shape (n,)
        centre : ndarray, shape (n, 2)
        """
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        val, grad = self.value_and_gradient(xy)
        val = np.maximum(val - offset, 0.0)
        g2 = np.sum(grad**2, axis=1)
        floor = 1e-6 / self.goal_speed**2
        weight = np.maximum(g2, floor)
        # c = x - J grad / |grad|^2: on a plateau of the map (|grad| ~ 0, e.g. a ridge between two
        # ways round an obstacle) the weight is tiny and the centre far; cap the distance so the
        # numbers stay finite - the product weight * (x - c), the gradient, is what matters.
        step = (val / weight)[:, None] * grad
        span = 10.0 * max(self.res * max(len(self.xs), len(self.ys)), 1e-12)
        ln = np.linalg.norm(step, axis=1, keepdims=True)
        step = np.where(ln > span, step * (span / np.maximum(ln, 1e-300)), step)
        # Inside the dead zone nothing pulls: a faint weight centred where the body is.
        weight = np.where(val > 0, weight, floor)
        return weight, xy - step


def cost_to_go(workspace, actuator, body, goal, *, start=None, resolution=None, clearance=0.0, floor=1e-3,
               graph=None, speeds=None, near=None):
    """Time-to-goal map of ``body`` for ``goal``, by Dijkstra over field-weighted directed edges.

    Parameters
    ----------
    workspace : Workspace
    actuator : Actuator
        The planning model (its field basis gives the speeds).
    body : Body
    goal : array_like, shape (2,)
        m.
    start : array_like, shape (2,), optional
        If given, the fastest path from here is stored as ``route`` (m).
    resolution : float, optional
        Grid cell, m (default :func:`fieldplan.routes.default_resolution`).
    clearance : float
        Extra distance kept from walls, m.
    floor : float
        Relative speed floor (see :func:`speed_table`).
    graph : networkx.Graph, optional
        A graph from :func:`fieldplan.routes.occupancy_graph` to reuse (same body radius).
    speeds : tuple, optional
        ``(nodes, xy, speed)`` from :func:`speed_table` to reuse (same graph and body).
    near : float, optional
        Radius of the goal region, m (see :class:`CostToGo`); at least 1.5 grid cells, the
        default. The planner passes three arrival radii, so the isotropic part covers the arrival disc.

    Returns
    -------
    CostToGo

    Raises
    ------
    WorkspaceError
        The body has no free space at this resolution.
    """
    res = float(resolution) if resolution else default_resolution(workspace)
    g = graph if graph is not None else occupancy_graph(workspace, body.radius, res, clearance=clearance)
    nodes, xy, speed = speeds if speeds is not None else speed_table(g, actuator, body, workspace.medium, floor)
    if not nodes:
        raise WorkspaceError(f"body {body.name!r} (radius {body.radius:g} m) has no free space on a "
                             f"{res:g} m grid: the workspace is too narrow for it.")
    goal = np.asarray(goal, dtype=float).reshape(2)
    xs, ys = g.graph["xs"], g.graph["ys"]
    V = len(nodes)
    index = {v: i for i, v in enumerate(nodes)}
    # Directed edge costs: a -> b takes length / (mean speed along a -> b at its two ends).
    edges = np.array([(index[a], index[b]) for a, b in g.edges], dtype=np.int64).reshape(-1, 2)
    rows, cols, cost = [], [], []
    if len(edges):
        for a, b in ((edges[:, 0], edges[:, 1]), (edges[:, 1], edges[:, 0])):
            d = xy[b] - xy[a]
            k = np.round(np.arctan2(d[:, 1], d[:, 0]) / (np.pi / 4)).astype(np.int64) % 8
            v = 0.5 * (speed[a, k] + speed[b, k])
            rows.append(a)
            cols.append(b)
            cost.append(np.linalg.norm(d, axis=1) / v)
    # The goal is an extra node; the cells around it (its 8 neighbours when it sits on a cell
    # centre) in straight sight join it, at the available speed toward it.
    gi = V
    dg = np.linalg.norm(xy - goal, axis=1)
    cand = np.flatnonzero(dg <= 1.5 * res)
    if len(cand):
        segs = shapely.linestrings(np.stack([np.repeat(goal[None], len(cand), 0), xy[cand]], axis=1))
        cand = cand[shapely.covers(g.graph["body_free"], segs)]
    if not len(cand):
        cand = np.array([int(np.argmin(dg))])
    dirs = goal - xy[cand]
    nd = np.maximum(np.linalg.norm(dirs, axis=1, keepdims=True), 1e-300)
    basis = actuator.basis([body] * len(cand), workspace.medium, xy[cand])
    vdir = available_speed(basis, dirs / nd)
    vmax = float(speed.max())
    vgoal = np.maximum(np.diag(vdir), floor * vmax)    # each cell's speed along its own direction
    rows.append(cand)
    cols.append(np.full(len(cand), gi))
    cost.append(dg[cand] / vgoal)
    rows, cols, cost = np.concatenate(rows), np.concatenate(cols), np.concatenate(cost)
    # Cost-to-go = shortest path *to* the goal: search from the goal over reversed edges.
    M = sp.csr_matrix((cost, (cols, rows)), shape=(V + 1, V + 1))
    dist, pred = dijkstra(M, directed=True, indices=gi, return_predecessors=True)
    J = dist[:V]
    # Speed for the final approach: the mean over directions at the goal's cells.
    goal_speed = float(np.mean(speed[cand])) if len(cand) else float(np.mean(speed))
    ny, nx_ = len(ys), len(xs)
    grid = np.full((ny, nx_), np.nan)
    reach = np.zeros((ny, nx_), dtype=bool)
    keys = np.array(nodes, dtype=np.int64).reshape(-1, 2)        # (ix, iy)
    ok = np.isfinite(J)
    grid[keys[ok, 1], keys[ok, 0]] = J[ok]
    reach[keys[ok, 1], keys[ok, 0]] = True
    if not ok.any():
        raise WorkspaceError(f"goal ({goal[0]:.6g}, {goal[1]:.6g}) m of body {body.name!r} is cut off from its "
                             "free space on the route grid.")
    # Outside the reachable cells: the nearest reachable value plus the distance at the median speed,
    # so the gradient points back into the free space.
    dist_out, (iy_n, ix_n) = distance_transform_edt(~reach, return_indices=True)
    vmed = float(np.median(speed))
    grid = np.where(reach, grid, grid[iy_n, ix_n] + dist_out * res / vmed)
    route = None
    if start is not None:
        route = _route_from(start, goal, xy, J, pred, g, gi)
    return CostToGo(xs, ys, grid, reach, goal, goal_speed, near=max(1.5 * res, float(near or 0.0)), route=route)


def _route_from(start, goal, xy, J, pred, graph, gi):
    """Fastest polyline from ``start`` to the goal along the Dijkstra tree (None if cut off)."""
    start = np.asarray(start, dtype=float).reshape(2)
    d = np.linalg.norm(xy - start, axis=1)
    order = np.argsort(d)[:16]
    order = order[np.isfinite(J[order])]
    if not len(order):
        return None
    segs = shapely.linestrings(np.stack([np.repeat(start[None], len(order), 0), xy[order]], axis=1))
    vis = shapely.covers(graph.graph["body_free"], segs)
    first = int(order[np.flatnonzero(vis)[0]]) if vis.any() else int(order[0])
    path = [start]
    v = first
    for _ in range(len(xy) + 1):
        if v == gi or v < 0:
            break
        path.append(xy[v])
        v = int(pred[v])
    path.append(goal)
    return smooth_route(np.asarray(path), graph.graph["free"] if graph.graph["free"].covers(
        shapely.linestrings(np.asarray(path))) else graph.graph["body_free"])
