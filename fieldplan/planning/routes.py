"""Routes: collision-free polylines per body by graph search over the free workspace.

Functions over plain data. :func:`occupancy_graph` rasterises the free space of a body (its radius
plus a clearance) into a networkx grid graph with 8-connectivity, keeping an edge only where the
straight segment between cell centres stays in that free space. :func:`shortest_route` joins a start
and a goal to the graph and runs ``networkx.astar_path``; :func:`smooth_route` shortcuts the grid
path to a polyline. :func:`set_field_costs` weighs each edge by the time the actuator needs to push
the body along it, :func:`assign_goals` matches bodies of one kind to goals by
``scipy.optimize.linear_sum_assignment``, and :func:`plan_routes` puts it together with prioritised
planning: each body's route avoids (by penalties on the graph) the goals of all other bodies and
the routes of bodies planned before it.

Examples
--------
>>> import numpy as np
>>> from fieldplan import Workspace, rectangle
>>> ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4.5e-4, 0, 5.5e-4, 6e-4)])
>>> g = occupancy_graph(ws, radius=2e-5, resolution=2.5e-5)
>>> route = shortest_route(g, [2e-4, 2e-4], [8e-4, 2e-4])
>>> bool(route[:, 1].max() > 6e-4)          # over the top of the wall
True
"""

from __future__ import annotations

from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import shapely
from scipy.optimize import linear_sum_assignment

from ..errors import WorkspaceError

__all__ = [
    "occupancy_graph",
    "shortest_route",
    "smooth_route",
    "route_length",
    "set_field_costs",
    "available_speed",
    "route_cost_matrix",
    "assign_goals",
    "plan_routes",
    "RoutePlan",
    "default_resolution",
    "GRID_DIRECTIONS",
]

# The eight grid steps of 8-connectivity; half of them suffice to enumerate undirected edges.
_STEPS = np.array([[1, 0], [0, 1], [1, 1], [1, -1]])
#: The eight grid directions (east, then counter-clockwise), unit vectors.
GRID_DIRECTIONS = np.array([[1, 0], [1, 1], [0, 1], [-1, 1], [-1, 0], [-1, -1], [0, -1], [1, -1]], dtype=float)
GRID_DIRECTIONS /= np.linalg.norm(GRID_DIRECTIONS, axis=1, keepdims=True)


def default_resolution(workspace, radius=None):
    """Default grid cell for routes, m: 1/64 of the workspace's larger side.

    64 cells a side keeps a graph of a few thousand nodes (tens of milliseconds to search);
    :func:`plan_routes` halves the cell (twice) for a body it cannot route, so passages narrower than
    a cell are still found. Common practice, no source.
    """
    xmin, ymin, xmax, ymax = workspace.bounds
    return float(max(xmax - xmin, ymax - ymin) / 64.0)


def occupancy_graph(workspace, radius, resolution, *, clearance=0.0):
    """Grid graph of the free space of a body of ``radius`` plus ``clearance``.

    Parameters
    ----------
    workspace : Workspace
    radius : float
        Body radius, m.
    resolution : float
        Cell size, m.
    clearance : float
        Extra distance kept from walls and obstacles, m.

    Returns
    -------
    networkx.Graph
        Nodes are ``(ix, iy)`` cell indices with attribute ``xy`` (cell centre, m); edges join
        8-neighbours whose connecting segment lies in the inflated free space, with attribute
        ``length`` (m). ``graph.graph`` holds ``free`` (the inflated free space, a shapely
        geometry), ``body_free`` (free space of the bare radius), ``radius``, ``clearance``,
        ``resolution``, ``xs``, ``ys``.
    """
    if not resolution > 0:
        raise WorkspaceError(f"route resolution must be > 0 m, got {resolution!r}.")
    if clearance < 0:
        raise WorkspaceError(f"route clearance must be >= 0 m, got {clearance!r}.")
    inflate = float(radius) + float(clearance)
    occ, xs, ys = workspace.occupancy(resolution, inflate)
    free = workspace.free_space(inflate)
    g = nx.Graph(free=free, body_free=workspace.free_space(float(radius)), radius=float(radius),
                 clearance=float(clearance), resolution=float(resolution), xs=xs, ys=ys)
    iy, ix = np.nonzero(occ)
    g.add_nodes_from(((int(a), int(b)), {"xy": (float(xs[a]), float(ys[b]))}) for a, b in zip(ix, iy))
    ny, nx_ = occ.shape
    for step in _STEPS:
        jx, jy = ix + step[0], iy + step[1]
        ok = (jx >= 0) & (jx < nx_) & (jy >= 0) & (jy < ny)
        a_x, a_y, b_x, b_y = ix[ok], iy[ok], jx[ok], jy[ok]
        ok2 = occ[b_y, b_x]
        a_x, a_y, b_x, b_y = a_x[ok2], a_y[ok2], b_x[ok2], b_y[ok2]
        if not len(a_x):
            continue
        segs = _segments(np.c_[xs[a_x], ys[a_y]], np.c_[xs[b_x], ys[b_y]])
        # Both end cells are free; the segment test catches corners cut through a thin obstacle.
        keep = shapely.covers(free, segs)
        length = float(resolution * np.hypot(*step))
        g.add_edges_from(((int(p), int(q)), (int(r), int(s)), {"length": length})
                         for p, q, r, s in zip(a_x[keep], a_y[keep], b_x[keep], b_y[keep]))
    return g


def _segments(a, b):
    coords = np.stack([np.asarray(a, float), np.asarray(b, float)], axis=1)
    return shapely.linestrings(coords)


def route_length(route):
    """Length of a polyline ``(P, 2)``, m."""
    route = np.asarray(route, dtype=float)
    return float(np.sum(np.linalg.norm(np.diff(route, axis=0), axis=1))) if len(route) > 1 else 0.0


def _node_arrays(graph):
    nodes = list(graph.nodes)
    xy = np.array([graph.nodes[n]["xy"] for n in nodes], dtype=float).reshape(-1, 2)
    return nodes, xy


def _attach(graph, point, cache):
    """Nodes visible from ``point`` (segment inside the body's bare free space), nearest first."""
    nodes, xy = cache
    if not len(nodes):
        return []
    p = np.asarray(point, dtype=float)
    d = np.linalg.norm(xy - p, axis=1)
    res = graph.graph["resolution"]
    reach = 2.0 * res + graph.graph["clearance"]
    for _ in range(6):
        cand = np.flatnonzero(d <= reach)
        if len(cand):
            cand = cand[np.argsort(d[cand])][:24]
            vis = shapely.covers(graph.graph["body_free"], _segments(np.repeat(p[None], len(cand), 0), xy[cand]))
            if vis.any():
                return [(nodes[c], float(d[c])) for c in cand[vis]]
        reach *= 2.0
    return []


def shortest_route(graph, start, goal, *, weight="length", smooth=True, heuristic_speed=None):
    """Shortest route from ``start`` to ``goal`` by A* (``networkx.astar_path``) on ``graph``.

    Parameters
    ----------
    graph : networkx.Graph
        From :func:`occupancy_graph`.
    start, goal : array_like, shape (2,)
        m; inside the body's free space (they may lie in the clearance margin).
    weight : str or callable
        Edge cost: an attribute name (``"length"`` in m, ``"time"`` in s after
        :func:`set_field_costs`) or ``f(u, v, data) -> cost`` as networkx accepts.
    smooth : bool
        Shortcut the grid path with :func:`smooth_route`.
    heuristic_speed : float, optional
        m/s; for time-like weights the A* heuristic is distance / this speed (it must not exceed
        the fastest edge speed, or A* may return a longer route). Default: Euclidean distance for
        ``"length"``, :attr:`graph.graph["max_speed"]` for ``"time"``, no heuristic otherwise.

    Returns
    -------
    ndarray, shape (P, 2)
        The route from ``start`` to ``goal``, m.

    Raises
    ------
    networkx.NetworkXNoPath
        If the goal cannot be reached in the graph (the message says which end is cut off).
    """
    start = np.asarray(start, dtype=float)
    goal = np.asarray(goal, dtype=float)
    free = graph.graph["free"]
    body_free = graph.graph["body_free"]
    direct = _segments(start[None], goal[None])[0]
    # A straight line in sight is the shortest route; for other costs A* decides.
    if weight == "length" and (shapely.covers(free, direct) or (
            np.linalg.norm(goal - start) <= 2 * graph.graph["resolution"] and shapely.covers(body_free, direct))):
        return np.array([start, goal])
    cache = _node_arrays(graph)
    s_nodes = _attach(graph, start, cache)
    g_nodes = _attach(graph, goal, cache)
    if not s_nodes:
        raise nx.NetworkXNoPath("the start is cut off from the route graph (no free cell in sight)")
    if not g_nodes:
        raise nx.NetworkXNoPath("the goal is cut off from the route graph (no free cell in sight)")
    S, G = ("_start",), ("_goal",)
    w_is_attr = isinstance(weight, str)
    speed = heuristic_speed
    if speed is None and weight == "time":
        speed = graph.graph.get("max_speed")
    link_cost = (lambda d: d / speed) if (weight == "time" and speed) else (lambda d: d)
    graph.add_node(S, xy=tuple(start))
    graph.add_node(G, xy=tuple(goal))
    try:
        for n, d in s_nodes:
            graph.add_edge(S, n, length=d, **({weight: link_cost(d)} if w_is_attr and weight != "length" else {}))
        for n, d in g_nodes:
            graph.add_edge(n, G, length=d, **({weight: link_cost(d)} if w_is_attr and weight != "length" else {}))
        pos = graph.nodes
        if weight == "length" or (speed and w_is_attr):
            scale = 1.0 if weight == "length" else 1.0 / speed

            def h(a, b):
                pa, pb = pos[a]["xy"], pos[b]["xy"]
                return scale * float(np.hypot(pa[0] - pb[0], pa[1] - pb[1]))
        else:
            h = None
        if callable(weight):
            user = weight

            def wfun(a, b, data):
                if a in (S, G) or b in (S, G):
                    return data["length"]
                return user(a, b, data)
        else:
            wfun = weight
        try:
            path = nx.astar_path(graph, S, G, heuristic=h, weight=wfun)
        except nx.NetworkXNoPath:
            raise nx.NetworkXNoPath("the goal is not connected to the start in the free space inflated by "
                                    f"radius + clearance = {graph.graph['radius'] + graph.graph['clearance']:.3g} m")
        pts = np.array([pos[n]["xy"] for n in path], dtype=float)
    finally:
        graph.remove_node(S)
        graph.remove_node(G)
    pts[0], pts[-1] = start, goal
    if not smooth:
        return pts
    # For time-like costs the route bends on purpose (toward fast regions): smooth only locally.
    jump = None if weight == "length" else 4.0 * graph.graph["resolution"] * np.sqrt(2.0)
    return smooth_route(pts, free, max_jump=jump)


def smooth_route(route, free, max_jump=None):
    """Shortcut a polyline while each new segment stays inside ``free``.

    Greedy: from each kept vertex jump to the farthest later vertex in straight sight. The original
    consecutive segments are always allowed (they were checked when the path was built), so the
    result is never worse than the input.

    Parameters
    ----------
    route : array_like, shape (P, 2)
        m.
    free : shapely geometry
        The region segments must stay in.
    max_jump : float, optional
        Longest new segment, m (local smoothing that keeps a route's overall shape).

    Returns
    -------
    ndarray, shape (Q, 2), Q <= P
    """
    pts = np.asarray(route, dtype=float)
    if len(pts) <= 2:
        return pts.copy()
    keep = [0]
    i = 0
    last = len(pts) - 1
    while i < last:
        cand = np.arange(i + 2, last + 1)
        if max_jump is not None and len(cand):
            cand = cand[np.linalg.norm(pts[cand] - pts[i], axis=1) <= max_jump * (1 + 1e-9)]
        nxt = i + 1
        if len(cand):
            vis = shapely.covers(free, _segments(np.repeat(pts[i][None], len(cand), 0), pts[cand]))
            if vis.any():
                nxt = int(cand[np.flatnonzero(vis)[-1]])
        keep.append(nxt)
        i = nxt
    out = pts[keep]
    if max_jump is None:
        out = _pull_taut(out, free)
    return out


def _pull_taut(pts, free, sweeps=30, bisections=12):
    """Slide interior vertices downhill in route length while both adjacent segments stay free.

    Shortcutting keeps grid vertices, which sit up to a cell away from the corners they turn round;
    moving each vertex along minus the gradient of ``|v - a| + |v - b|`` (a line search, bisected
    against the free space) brings it onto the corner, so the length approaches the taut string.
    """
    pts = pts.copy()
    if len(pts) < 3:
        return pts
    scale = float(np.max(np.linalg.norm(np.diff(pts, axis=0), axis=1)))

    def ok(a, b, c):
        return bool(shapely.covers(free, _segments(np.stack([a, c]), np.stack([c, b]))).all())

    for _ in range(sweeps):
        moved = 0.0
        for i in range(1, len(pts) - 1):
            a, v, b = pts[i - 1], pts[i], pts[i + 1]
            ua, ub = v - a, v - b
            la, lb = np.linalg.norm(ua), np.linalg.norm(ub)
            if la == 0 or lb == 0:
                continue
            grad = ua / la + ub / lb
            gn = np.linalg.norm(grad)
            if gn < 1e-9:
                continue
            d0 = -grad / gn
            # Where an adjacent segment already grazes an obstacle, the steepest direction is
            # blocked; directions turned up to 75 degrees let the vertex slide along the wall.
            best, best_len = v, la + lb
            for ang in (0.0, 0.4, -0.4, 0.8, -0.8, 1.3, -1.3):
                c, s_ = np.cos(ang), np.sin(ang)
                d = np.array([c * d0[0] - s_ * d0[1], s_ * d0[0] + c * d0[1]])
                lo, hi = 0.0, min(la, lb)
                if ok(a, b, v + hi * d):
                    lo = hi
                else:
                    for _ in range(bisections):
                        mid = 0.5 * (lo + hi)
                        if ok(a, b, v + mid * d):
                            lo = mid
                        else:
                            hi = mid
                new = v + lo * d
                length = np.linalg.norm(new - a) + np.linalg.norm(new - b)
                if length < best_len - 1e-12 * scale:
                    best, best_len = new, length
                if ang == 0.0 and lo > 0.5 * min(la, lb):
                    break
            moved = max(moved, float(np.linalg.norm(best - v)))
            pts[i] = best
        if moved < 1e-4 * scale:
            break
    # Vertices that became collinear are dropped.
    keep = [0]
    for i in range(1, len(pts) - 1):
        a, v, b = pts[keep[-1]], pts[i], pts[i + 1]
        cross = abs((v - a)[0] * (b - a)[1] - (v - a)[1] * (b - a)[0])
        if cross > 1e-12 * max(np.dot(b - a, b - a), 1e-300):
            keep.append(i)
    keep.append(len(pts) - 1)
    return pts[keep]


def available_speed(basis, directions=None):
    """Fastest speed each body could be pushed along each direction, alone, m/s.

    Linear mode: ``d . drift + sum_k max(lo_k d . f_k, hi_k d . f_k)`` (the box's best corner);
    timeshare mode: ``d . drift + max(0, max_k d . f_k)`` (the best primitive, held all period).

    Parameters
    ----------
    basis : FieldBasis
        At the positions of interest (one "body" per position).
    directions : ndarray, shape (D, 2), optional
        Unit vectors; default the 8 grid directions.

    Returns
    -------
    ndarray, shape (n, D)
        m/s (may be negative where the drift pushes backwards harder than any input can help).
    """
    dirs = GRID_DIRECTIONS if directions is None else np.asarray(directions, dtype=float)
    proj = np.einsum("knc,dc->knd", basis.fields, dirs)       # (K, n, D)
    drift = basis.drift @ dirs.T                             # (n, D)
    if basis.mode == "linear":
        lo, hi = basis.lower[:, None, None], basis.upper[:, None, None]
        return drift + np.sum(np.maximum(lo * proj, hi * proj), axis=0)
    return drift + np.maximum(0.0, proj.max(axis=0))


def set_field_costs(graph, actuator, body, medium, *, name="time", floor=1e-3):
    """Weigh every edge by the time the actuator needs to push ``body`` along it.

    The edge cost is its length divided by the mean available speed (see :func:`available_speed`)
    along the edge's direction at its two end cells, m / (m/s) = s. Speeds below ``floor`` times the
    fastest speed on the graph are raised to it, so regions the fields barely reach are expensive
    but not cut off.

    Parameters
    ----------
    graph : networkx.Graph
        From :func:`occupancy_graph`; modified in place (edge attribute ``name``; graph attribute
        ``max_speed`` in m/s for the A* heuristic).
    actuator : Actuator
    body : Body
    medium : Medium
    name : str
        Edge attribute to write.
    floor : float
        Relative speed floor.

    Returns
    -------
    networkx.Graph
        ``graph``.
    """
    nodes, xy = _node_arrays(graph)
    if not nodes:
        return graph
    basis = actuator.basis([body] * len(nodes), medium, xy)
    speed = available_speed(basis)                        # (n, 8)
    vmax = float(max(speed.max(), 1e-300))
    speed = np.maximum(speed, floor * vmax)
    index = {n: i for i, n in enumerate(nodes)}
    edges = list(graph.edges)
    if edges:
        ia = np.fromiter((index[a] for a, _ in edges), dtype=np.int64, count=len(edges))
        ib = np.fromiter((index[b] for _, b in edges), dtype=np.int64, count=len(edges))
        d = xy[ib] - xy[ia]
        k = np.round(np.arctan2(d[:, 1], d[:, 0]) / (np.pi / 4)).astype(np.int64) % 8
        # Undirected graph: use the faster sense of the edge's two directions, averaged over its ends.
        fwd = 0.5 * (speed[ia, k] + speed[ib, k])
        back = 0.5 * (speed[ia, (k + 4) % 8] + speed[ib, (k + 4) % 8])
        length = np.linalg.norm(d, axis=1)
        cost = length / np.maximum(fwd, back)
        nx.set_edge_attributes(graph, dict(zip(edges, cost.tolist())), name)
    graph.graph["max_speed"] = vmax
    return graph


def route_cost_matrix(graph, starts, goals, *, weight="length"):
    """Cost of the best route from every start to every goal on one graph (Dijkstra from each start).

    Parameters
    ----------
    graph : networkx.Graph
        From :func:`occupancy_graph`.
    starts : array_like, shape (a, 2)
        m.
    goals : array_like, shape (b, 2)
        m.
    weight : str
        Edge attribute.

    Returns
    -------
    ndarray, shape (a, b)
        Cost (m for ``"length"``), ``inf`` where no route exists. Grid costs, before smoothing:
        comparable between pairs, an upper bound on the smoothed length.
    """
    starts = np.atleast_2d(np.asarray(starts, float))
    goals = np.atleast_2d(np.asarray(goals, float))
    cache = _node_arrays(graph)
    speed = graph.graph.get("max_speed") if weight == "time" else None
    link = (lambda d: d / speed) if speed else (lambda d: d)
    g_links = [_attach(graph, g, cache) for g in goals]
    out = np.full((len(starts), len(goals)), np.inf)
    for i, s in enumerate(starts):
        s_links = _attach(graph, s, cache)
        if not s_links:
            continue
        S = ("_start",)
        graph.add_node(S, xy=tuple(s))
        try:
            for n, d in s_links:
                graph.add_edge(S, n, length=d, **({weight: link(d)} if weight != "length" else {}))
            dist = nx.single_source_dijkstra_path_length(graph, S, weight=weight)
        finally:
            graph.remove_node(S)
        for j, links in enumerate(g_links):
            direct = np.linalg.norm(goals[j] - s)
            if shapely.covers(graph.graph["free"], _segments(s[None], goals[j][None])[0]):
                out[i, j] = link(direct)
                continue
            c = [dist[n] + link(d) for n, d in links if n in dist]
            if c:
                out[i, j] = min(c)
    return out


def assign_goals(costs):
    """Optimal matching of bodies (rows) to goals (columns) minimising the summed cost.

    ``scipy.optimize.linear_sum_assignment`` on ``costs``; infinite costs (no route) are replaced by
    a cost larger than any finite sum, so they are used only when nothing else is possible.

    Parameters
    ----------
    costs : array_like, shape (n, n)

    Returns
    -------
    ndarray of int, shape (n,)
        ``goal_of[i]``: the column assigned to row ``i``.

    Examples
    --------
    >>> assign_goals([[1.0, 5.0], [1.0, 2.0]]).tolist()
    [0, 1]
    """
    c = np.array(costs, dtype=float)
    if c.ndim != 2 or c.shape[0] != c.shape[1]:
        raise WorkspaceError(f"assign_goals needs a square cost matrix, got shape {c.shape}.")
    finite = np.isfinite(c)
    big = (np.abs(c[finite]).sum() + 1.0) * 10.0 if finite.any() else 1.0
    c[~finite] = big
    rows, cols = linear_sum_assignment(c)
    out = np.empty(len(rows), dtype=int)
    out[rows] = cols
    return out


@dataclass
class RoutePlan:
    """Routes for all bodies.

    Attributes
    ----------
    routes : list of ndarray (P_i, 2) or None
        m; ``None`` where no route exists (see ``reasons``).
    lengths : ndarray, shape (n,)
        m (``inf`` without a route).
    goal_of : ndarray of int, shape (n,)
        Index into the goals given, per body (the identity unless goals were assigned).
    goals : ndarray, shape (n, 2)
        The goal of each body after assignment, m.
    order : list of int
        Planning priority (first planned first).
    reasons : list of str or None
        Why a body has no route.
    graphs : dict
        ``radius -> networkx.Graph`` used (reused by re-routing).
    notes : list of str
        What the conflict resolution did.
    """

    routes: list
    lengths: np.ndarray
    goal_of: np.ndarray
    goals: np.ndarray
    order: list
    reasons: list
    graphs: dict = field(default_factory=dict, repr=False)
    notes: list = field(default_factory=list)

    @property
    def success(self):
        return all(r is not None for r in self.routes)


def _near_polyline(xy, poly, dist):
    """Boolean (m,): points within ``dist`` of the polyline ``poly`` (P, 2)."""
    poly = np.asarray(poly, float)
    if len(poly) == 1:
        return np.linalg.norm(xy - poly[0], axis=1) <= dist
    a, b = poly[:-1], poly[1:]
    ab = b - a
    L2 = np.maximum(np.sum(ab * ab, axis=1), 1e-300)
    t = np.clip(np.einsum("mkc,kc->mk", xy[:, None, :] - a[None], ab) / L2, 0.0, 1.0)
    proj = a[None] + t[..., None] * ab[None]
    d = np.linalg.norm(xy[:, None, :] - proj, axis=2).min(axis=1)
    return d <= dist


def plan_routes(workspace, bodies, starts, goals, *, clearance=0.0, resolution=None, actuator=None,
                field_aware=False, assign=False, route_penalty=1.0, goal_penalty=30.0, graphs=None):
    """Routes for every body, with optional goal assignment and prioritised conflict resolution.

    Parameters
    ----------
    workspace : Workspace
    bodies : sequence of Body, length n
    starts, goals : array_like, shape (n, 2)
        m.
    clearance : float
        Extra distance from walls in the route graph, and extra gap between bodies' corridors, m.
    resolution : float, optional
        Grid cell, m (default :func:`default_resolution`; halved twice for a body with no route).
    actuator : Actuator, optional
        Needed for ``field_aware``.
    field_aware : bool
        Edge cost = time (length / available speed) instead of length.
    assign : bool
        Bodies of the same kind (equal :class:`Body`) may swap goals; the matching minimises the sum
        of route costs (``linear_sum_assignment``).
    route_penalty : float
        Relative extra cost of a cell within reach of a higher-priority body's route (shared
        corridors are allowed but discouraged).
    goal_penalty : float
        Relative extra cost of a cell within reach of another body's goal (a body parked at its goal
        would block the corridor).
    graphs : dict, optional
        Reuse ``radius -> graph`` from an earlier call.

    Returns
    -------
    RoutePlan
    """
    starts = np.asarray(starts, float).reshape(-1, 2)
    goals = np.asarray(goals, float).reshape(-1, 2)
    n = len(bodies)
    if field_aware and actuator is None:
        raise WorkspaceError("plan_routes: field_aware=True needs the actuator.")
    res = float(resolution) if resolution else default_resolution(workspace)
    graphs = {} if graphs is None else graphs
    weight = "time" if field_aware else "length"
    body_graph = []
    for b in bodies:
        key = (b.radius, b if field_aware else None)
        if key not in graphs:
            g = occupancy_graph(workspace, b.radius, res, clearance=clearance)
            if field_aware:
                set_field_costs(g, actuator, b, workspace.medium)
            graphs[key] = g
        body_graph.append(graphs[key])
    goal_of = np.arange(n)
    notes = []
    if assign and n > 1:
        kinds = {}
        for i, b in enumerate(bodies):
            kinds.setdefault(b, []).append(i)
        for b, idx in kinds.items():
            if len(idx) < 2:
                continue
            C = route_cost_matrix(body_graph[idx[0]], starts[idx], goals[idx], weight=weight)
            perm = assign_goals(C)
            goal_of[idx] = np.asarray(idx)[perm]
            notes.append(f"goals of kind {b.name!r} assigned by minimum total route cost "
                         f"({np.sum(C[np.arange(len(idx)), perm]):.3g} {'s' if field_aware else 'm'})")
    G = goals[goal_of]
    # Priority: longest straight-line trip first; it has the fewest alternatives.
    order = list(np.argsort(-np.linalg.norm(G - starts, axis=1), kind="stable"))
    routes = [None] * n
    reasons = [None] * n
    radii = np.array([b.radius for b in bodies])
    jump = 4.0 * res * np.sqrt(2.0) if field_aware else None
    for rank, i in enumerate(order):
        g = body_graph[i]
        nodes, xy = _node_arrays(g)
        pen = np.zeros(len(nodes))
        for j in range(n):
            if j == i:
                continue
            reach = radii[i] + radii[j] + clearance
            pen += goal_penalty * (np.linalg.norm(xy - G[j], axis=1) <= reach)
            if routes[j] is not None:
                pen += route_penalty * _near_polyline(xy, routes[j], reach)
        wfun = None
        if pen.any():
            factor = dict(zip(nodes, 1.0 + pen))

            def wfun(a, b, data, _f=factor, _w=weight):
                return data[_w] * 0.5 * (_f[a] + _f[b])
        try:
            route = shortest_route(g, starts[i], G[i], weight=wfun or weight, smooth=False)
        except nx.NetworkXNoPath as exc:
            route = None
            reason = str(exc)
            # A passage narrower than a cell is invisible to the grid: look again on finer grids.
            for fine in (res / 2, res / 4):
                g2 = occupancy_graph(workspace, bodies[i].radius, fine, clearance=clearance)
                if field_aware:
                    set_field_costs(g2, actuator, bodies[i], workspace.medium)
                try:
                    route = shortest_route(g2, starts[i], G[i], weight=weight, smooth=False)
                except nx.NetworkXNoPath as exc2:
                    reason = str(exc2)
                    continue
                g = g2
                notes.append(f"body {i} ({bodies[i].name}) routed on a finer grid ({fine:.3g} m cells)")
                break
            if route is None:
                reasons[i] = reason + f" (also tried grids of {res / 2:.3g} and {res / 4:.3g} m)"
                continue
        if wfun is not None and pen.any():
            # Smoothing only within the unpenalised free space keeps the detour the penalties chose.
            near = [G[j] for j in range(n) if j != i]
            free = g.graph["free"]
            if near:
                keep_out = shapely.union_all([shapely.Point(p).buffer(radii[i] + radii[j] + clearance)
                                              for j, p in zip([j for j in range(n) if j != i], near)])
                free_s = free.difference(keep_out)
                route = smooth_route(route, free_s if not free_s.is_empty else free, max_jump=jump)
            else:
                route = smooth_route(route, free, max_jump=jump)
            through = [j for j in range(n) if j != i and _near_polyline(
                np.asarray([G[j]]), route, radii[i] + radii[j])[0]]
            if through:
                notes.append(f"route of body {i} ({bodies[i].name}) passes the goal of bodies {through}: "
                             "no way around; the controller's separation constraint orders them")
        else:
            route = smooth_route(route, g.graph["free"], max_jump=jump)
        routes[i] = route
    lengths = np.array([route_length(r) if r is not None else np.inf for r in routes])
    return RoutePlan(routes, lengths, goal_of, G, [int(o) for o in order], reasons, graphs, notes)
