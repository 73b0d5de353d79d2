import numpy as np
import pytest

from fieldplan import Workspace, WorkspaceError, circle, polygon, rectangle


def make():
    return Workspace((0, 0, 1e-3, 1e-3), [rectangle(4e-4, 0, 6e-4, 6e-4), circle((2e-4, 8e-4), 5e-5)])


def test_contains_respects_radius_and_obstacles():
    ws = make()
    pts = np.array([[1e-4, 1e-4], [5e-4, 3e-4], [3.9e-4, 3e-4], [5e-4, 7e-4]])
    assert ws.contains(pts).tolist() == [True, False, True, True]
    # 10 um from the obstacle edge: free for a 5 um body, not for a 20 um one
    assert ws.contains([[3.9e-4, 3e-4]], 5e-6)[0]
    assert not ws.contains([[3.9e-4, 3e-4]], 2e-5)[0]


def test_clearance_and_nearest_wall_normal():
    ws = make()
    d = ws.clearance([[3.9e-4, 3e-4], [5e-4, 3e-4]])
    assert d[0] == pytest.approx(1e-5)
    assert d[1] < 0
    pts, normals = ws.nearest_wall([[3.9e-4, 3e-4]])
    np.testing.assert_allclose(pts[0], [4e-4, 3e-4])
    np.testing.assert_allclose(normals[0], [-1.0, 0.0])   # points from the wall into free space


def test_project_puts_bodies_back_in_free_space():
    ws = make()
    xy, moved = ws.project([[4.05e-4, 3e-4], [1e-4, 1e-4]], 1e-5)
    assert moved.tolist() == [True, False]
    assert ws.contains(xy, 1e-5).all()
    assert xy[0, 0] == pytest.approx(3.9e-4, abs=1e-10)


def test_occupancy_raster():
    free, xs, ys = make().occupancy(1e-5)
    assert free.shape == (len(ys), len(xs))
    frac = free.mean()
    expected = 1 - (2e-4 * 6e-4 + np.pi * 5e-5**2) / 1e-6
    assert frac == pytest.approx(expected, abs=0.01)


def test_bad_geometry_is_rejected():
    with pytest.raises(WorkspaceError, match="split the free space"):
        Workspace((0, 0, 1, 1), [rectangle(0.4, -0.1, 0.6, 1.1)])
    with pytest.raises(WorkspaceError, match="no free space"):
        Workspace((0, 0, 1, 1), [rectangle(-1, -1, 2, 2)])
    with pytest.raises(WorkspaceError, match="not simple"):
        polygon([(0, 0), (1, 1), (1, 0), (0, 1)])
    with pytest.raises(WorkspaceError, match="radius"):
        circle((0, 0), 0.0)


def test_sample_is_reproducible_and_separated():
    ws = make()
    a = ws.sample(10, 1e-5, rng=3, separation=5e-5)
    b = ws.sample(10, 1e-5, rng=3, separation=5e-5)
    np.testing.assert_array_equal(a, b)
    assert ws.contains(a, 1e-5).all()
    d = np.linalg.norm(a[:, None] - a[None], axis=2) + np.eye(10)
    assert d.min() >= 5e-5


def test_obstacles_checked_all_at_once_still_name_the_bad_one():
    from fieldplan.errors import WorkspaceError
    from fieldplan.world.workspace import Workspace, rectangle

    good = rectangle(0.1, 0.1, 0.2, 0.2)
    for bad in ((0, 0, 1, 1), "square", shapely_bowtie()):
        with pytest.raises(WorkspaceError, match="obstacle 1 "):
            Workspace((0, 0, 1, 1), [good, bad])


def test_overlapping_obstacles_are_merged_into_one_solid():
    import shapely

    from fieldplan.world.workspace import Workspace, rectangle

    ws = Workspace((0, 0, 1, 1), [rectangle(0.1, 0.1, 0.3, 0.3), rectangle(0.2, 0.2, 0.4, 0.4),
                                  rectangle(0.6, 0.6, 0.7, 0.7)])
    assert ws.free_space(0.0).area == pytest.approx(1 - (0.04 + 0.04 - 0.01) - 0.01)
    # grown by 0.02 m the merged pair and the far square are two holes of one connected region
    grown = ws.free_space(0.02)
    assert grown.is_valid and grown.geom_type == "Polygon" and len(grown.interiors) == 2
    assert len(ws.obstacle_index.query(shapely.Point(0.25, 0.25), predicate="within")) == 2


def shapely_bowtie():
    from shapely.geometry import Polygon

    return Polygon([(0.5, 0.5), (0.6, 0.6), (0.6, 0.5), (0.5, 0.6)])
