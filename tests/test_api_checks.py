"""The API checks its arguments like the CLI does (issue 16 item 15): non-numeric positions and a
string passed as a body give a clear error naming the argument, never a raw numpy ValueError or an
AttributeError. fieldplan.world.body.check_positions / check_bodies are the shared validators."""

import numpy as np
import pytest

from fieldplan import Body, Workspace
from fieldplan.errors import FieldplanError, WorkspaceError
from fieldplan.world.body import check_bodies, check_positions

BEAD = Body("bead", 5e-6, 1050.0)


@pytest.mark.parametrize("bad, fragment", [
    ([["a", "b"]], "entry 'a' is a str"),
    ([["150 um", 0.0]], "to_si('150 um', 'm')"),
    ("0.1, 0.2", "a str, not an array"),
    (None, "NoneType"),
    ([[1e-4, 2e-4], [3e-4]], "ragged list"),
    ([[1e-4, [2e-4]]], "ragged list"),
    ([[1e-4, 2e-4, 3e-4]], "shape (1, 3)"),
    ([[1e-4, float("nan")]], "non-finite value at row 0"),
    ([[1e-4, float("inf")], [0, 0]], "non-finite"),
    ([{"x": 1}], "is a dict"),
    (5.0, "shape ()"),
])
def test_bad_positions_name_the_argument(bad, fragment):
    with pytest.raises(FieldplanError, match="starts must be numbers in metres") as err:
        check_positions(bad, "starts")
    assert fragment in str(err.value)
    assert isinstance(err.value, ValueError)


def test_positions_count_and_shapes():
    assert check_positions([1e-4, 2e-4], "goal").shape == (1, 2)
    assert check_positions(np.zeros((0, 2)), "xy").shape == (0, 2)
    with pytest.raises(FieldplanError, match="3 positions for 2 bodies"):
        check_positions(np.zeros((3, 2)), "starts", n=2)
    with pytest.raises(WorkspaceError, match="xy must be numbers"):
        check_positions([["x", 1]], "xy", error=WorkspaceError)


def test_workspace_methods_check_positions():
    ws = Workspace((0, 0, 1e-3, 1e-3))
    for method in (ws.contains, ws.clearance, ws.nearest_wall):
        with pytest.raises(WorkspaceError, match="xy must be numbers in metres.*entry 'a' is a str"):
            method([["a", 1e-4]])
    with pytest.raises(WorkspaceError, match="ragged"):
        ws.project([[1e-4, 1e-4], [2e-4]], 1e-5)
    assert ws.contains([[5e-4, 5e-4]]).tolist() == [True]
    xy, moved = ws.project([[-1e-4, 5e-4]], 1e-5)
    assert moved.tolist() == [True] and ws.contains(xy, 1e-5).all()


@pytest.mark.parametrize("bad, fragment", [
    ("bead", "got the string 'bead'"),
    (["bead"], "bodies[0] must be a fieldplan.Body, got the string 'bead'"),
    ([BEAD, 3.0], "bodies[1] must be a fieldplan.Body, got float 3.0"),
    (BEAD, "got a single Body 'bead'; pass [bead]"),
    ([], "at least one"),
    (42, "got int 42"),
])
def test_bad_bodies_are_named(bad, fragment):
    with pytest.raises(FieldplanError) as err:
        check_bodies(bad)
    assert fragment in str(err.value)


def test_good_bodies_pass_through():
    assert check_bodies([BEAD, BEAD]) == (BEAD, BEAD)
    assert check_bodies((b for b in [BEAD])) == (BEAD,)
