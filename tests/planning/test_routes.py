"""Routes: grid graph, A*, smoothing, field-aware costs, goal assignment, prioritised planning."""

import itertools

import networkx as nx
import numpy as np
import pytest
import shapely

from fieldplan import Actuator, Body, Channel, Workspace, rectangle, water
from fieldplan.planning.routes import (
    assign_goals,
    available_speed,
    occupancy_graph,
    plan_routes,
    route_cost_matrix,
    route_length,
    set_field_costs,
    shortest_route,
)

BEAD = Body("bead", radius=1e-5, density=1050.0)


class UniformField(Actuator):
    """Two channels pushing every body along x and y at ``speed`` m/s per unit input (constant fields)."""

    tags = frozenset({"affine_in_input", "zero_idle"})
    extent = (0.0, 1e-3, 0.0, 1e-3)

    def __init__(self, speed=1e-5):
        self.speed = speed

    @property
    def channels(self):
        return (Channel("x", "1", -1, 1), Channel("y", "1", -1, 1))

    def _velocity(self, body, medium, xy, u):
        return np.broadcast_to(self.speed * np.asarray(u), xy.shape).copy()


def _covered(free, route, tol=1e-12):
    segs = shapely.linestrings(np.stack([route[:-1], route[1:]], axis=1))
    return bool(np.all(shapely.covers(free.buffer(tol), segs)))


def test_straight_route_when_goal_in_sight():
    """In an empty box the shortest route is the straight segment (length |g - s|, exact)."""
    ws = Workspace((0, 0, 1e-3, 1e-3))
    g = occupancy_graph(ws, BEAD.radius, 2.5e-5)
    s, e = np.array([1e-4, 2e-4]), np.array([8e-4, 7e-4])
    r = shortest_route(g, s, e)
    assert r.shape == (2, 2)
    assert route_length(r) == pytest.approx(np.linalg.norm(e - s), rel=1e-12)


def test_grid_path_length_is_octile_distance():
    """Unsmoothed 8-connected A* between cell centres in an empty box has the octile length
    res * (max(dx, dy) + (sqrt 2 - 1) min(dx, dy)) (hand computed: 8-neighbour grid metric)."""
    ws = Workspace((0, 0, 1e-3, 1e-3))
    res = 2.5e-5
    g = occupancy_graph(ws, BEAD.radius, res)
    xs, ys = g.graph["xs"], g.graph["ys"]
    a, b = (3, 5), (30, 17)                       # cell indices (ix, iy)
    s, e = np.array([xs[a[0]], ys[a[1]]]), np.array([xs[b[0]], ys[b[1]]])
    path = nx.astar_path(g, a, b, weight="length")
    length = sum(g.edges[u, v]["length"] for u, v in zip(path[:-1], path[1:]))
    dx, dy = abs(b[0] - a[0]), abs(b[1] - a[1])
    assert length == pytest.approx(res * (max(dx, dy) + (np.sqrt(2) - 1) * min(dx, dy)), rel=1e-12)
    # ... and smoothing turns it into the straight line.
    assert route_length(shortest_route(g, s, e)) == pytest.approx(np.linalg.norm(e - s), rel=1e-12)


def _taut_length_over_wall(s, e, corner_l, corner_r, rho):
    """Shortest path from s to e over a wall whose top corners, inflated by rho, are circle arcs:
    tangent segment + arc + straight top + arc + tangent segment (the taut string; the shortest path
    around a convex obstacle follows tangents and the boundary, e.g. de Berg et al., Computational
    Geometry, 3rd ed., ch. 15)."""
    total = 0.0
    for p, c, side in ((s, corner_l, -1), (e, corner_r, 1)):
        d = np.linalg.norm(p - c)
        tangent = np.sqrt(d * d - rho * rho)
        # angle at the corner between the line to p and the tangent point, then to the vertical
        ang_p = np.arctan2(p[0] - c[0], p[1] - c[1]) * side      # angle of p from +y, measured outward
        arc = abs(ang_p) - np.arccos(rho / d)
        total += tangent + rho * arc
    return total + (corner_r[0] - corner_l[0])


def test_route_over_wall_matches_taut_string_length():
    ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4.5e-4, 0, 5.5e-4, 6e-4)])
    clearance = 1e-5
    rho = BEAD.radius + clearance
    g = occupancy_graph(ws, BEAD.radius, 1e-3 / 64, clearance=clearance)
    s, e = np.array([2e-4, 2e-4]), np.array([8e-4, 2e-4])
    r = shortest_route(g, s, e)
    exact = _taut_length_over_wall(s, e, np.array([4.5e-4, 6e-4]), np.array([5.5e-4, 6e-4]), rho)
    # The polygonal buffer is inscribed in the true inflated region, so the route may be shorter by
    # the chord sag (< 0.1 %); a route with one vertex per corner is longer by at most ~1 %.
    assert exact * (1 - 1e-3) <= route_length(r) <= exact * 1.01
    assert _covered(g.graph["free"], r)


def test_no_route_enters_an_inflated_obstacle():
    rng = np.random.default_rng(3)
    obstacles = [rectangle(2e-4, 2e-4, 4e-4, 7e-4), rectangle(5.5e-4, 0, 6.5e-4, 5e-4),
                 rectangle(6e-4, 7e-4, 9e-4, 8e-4)]
    ws = Workspace((0, 0, 1e-3, 1e-3), obstacles)
    clearance = 1e-5
    g = occupancy_graph(ws, BEAD.radius, 1e-3 / 64, clearance=clearance)
    free = ws.free_space(BEAD.radius + clearance)
    pts = ws.sample(24, BEAD.radius + clearance, rng)
    for s, e in zip(pts[::2], pts[1::2]):
        r = shortest_route(g, s, e)
        assert np.allclose(r[0], s) and np.allclose(r[-1], e)
        assert _covered(free, r), "a route segment leaves the inflated free space"


def test_unreachable_goal_raises_no_path():
    # A gap of 15 um between two obstacles: open to the medium, closed to a 10 um radius bead.
    ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4.9e-4, 0, 5.1e-4, 4.9e-4),
                                        rectangle(4.9e-4, 5.05e-4, 5.1e-4, 1e-3)])
    g = occupancy_graph(ws, BEAD.radius, 1e-3 / 64)
    with pytest.raises(nx.NetworkXNoPath, match="not connected|cut off"):
        shortest_route(g, [2e-4, 5e-4], [8e-4, 5e-4])


def test_available_speed_and_field_costs_by_hand():
    """Uniform fields (v along x and y, inputs in [-1, 1]): the best corner of the box gives speed v
    along an axis and v (|cos| + |sin|) = sqrt(2) v along a diagonal (hand computed), so every edge
    costs (edge length) / (that speed): res / v for axis edges, sqrt(2) res / (sqrt(2) v) diagonally."""
    v = 2e-5
    act = UniformField(v)
    ws = Workspace((0, 0, 1e-3, 1e-3))
    B = act.basis([BEAD] * 2, water(), [[1e-4, 1e-4], [5e-4, 5e-4]])
    sp = available_speed(B, np.array([[1.0, 0.0], [np.sqrt(0.5), np.sqrt(0.5)]]))
    np.testing.assert_allclose(sp, [[v, np.sqrt(2) * v]] * 2, rtol=1e-12)
    res = 5e-5
    g = set_field_costs(occupancy_graph(ws, BEAD.radius, res), act, BEAD, water())
    times = np.array([d["time"] for _, _, d in g.edges(data=True)])
    np.testing.assert_allclose(times, res / v, rtol=1e-9)


def test_assignment_matches_brute_force():
    rng = np.random.default_rng(0)
    for n in (2, 3, 4, 5, 6):
        for _ in range(5):
            C = rng.uniform(0, 10, (n, n))
            if n > 2:
                C[rng.integers(n), rng.integers(n)] = np.inf        # one forbidden pairing
            perm = assign_goals(C)
            best = min(sum(C[i, p[i]] for i in range(n)) for p in itertools.permutations(range(n)))
            assert sum(C[i, perm[i]] for i in range(n)) == pytest.approx(best)
            assert sorted(perm.tolist()) == list(range(n))


def test_assigned_routes_minimise_total_length():
    """plan_routes(assign=True) picks the permutation of goals with the least total route length
    among all permutations (brute force over separately computed routes)."""
    ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4e-4, 3e-4, 6e-4, 7e-4)])
    starts = np.array([[1e-4, 1e-4], [1e-4, 9e-4], [9e-4, 5e-4]])
    goals = np.array([[9e-4, 9e-4], [2e-4, 5e-4], [8e-4, 1e-4]])
    bodies = [BEAD] * 3
    rp = plan_routes(ws, bodies, starts, goals, assign=True, goal_penalty=0.0, route_penalty=0.0)
    g = occupancy_graph(ws, BEAD.radius, 1e-3 / 64)
    L = np.array([[route_length(shortest_route(g, s, e)) for e in goals] for s in starts])
    best = min(sum(L[i, p[i]] for i in range(3)) for p in itertools.permutations(range(3)))
    assert sum(rp.lengths) == pytest.approx(best, rel=0.02)
    C = route_cost_matrix(g, starts, goals)
    assert np.all(C >= L * (1 - 1e-9))          # grid costs bound the smoothed lengths from above


def test_prioritised_route_avoids_another_bodys_goal():
    ws = Workspace((0, 0, 1e-3, 1e-3))
    a, b = Body("a", 1e-5, 1050.0), Body("b", 1.5e-5, 1050.0)
    starts = np.array([[1e-4, 5e-4], [5e-4, 1e-4]])
    goals = np.array([[9e-4, 5e-4], [5e-4, 5e-4]])       # b parks on a's straight line
    rp = plan_routes(ws, [a, b], starts, goals, clearance=5e-6)
    r = rp.routes[0]
    seg = shapely.LineString(r)
    assert seg.distance(shapely.Point(goals[1])) >= a.radius + b.radius
    assert route_length(r) > 8e-4                           # it detoured
    assert rp.success and rp.order[0] == 0                 # longest trip planned first
