"""Body: the resting gap above the floor, validation, hashing and the scenario round trip."""

import dataclasses
import textwrap

import pytest

from fieldplan import Body, FieldplanError, water
from fieldplan.world.body import DEFAULT_GAP
from fieldplan.world.physics import drag_coefficient, stokes_drag, wall_drag_parallel


def test_default_gap_is_fixed_not_a_fraction_of_the_radius():
    # Body.DEFAULT_GAP: 100 nm, common practice (double layer / TIRM heights; see fieldplan.world.body).
    for r in (0.5e-6, 5e-6, 100e-6):
        b = Body("b", r, 1050.0)
        assert b.height == pytest.approx(r + 100e-9, rel=1e-15, abs=0) and b.clearance == pytest.approx(DEFAULT_GAP, rel=1e-6, abs=0)
        assert b.gap is None
    big = Body("ball", 100e-6, 2500.0)
    # A 100 um sphere 100 nm off the floor (gap/r = 1e-3): near-contact drag, not the old 0.1 r value.
    assert wall_drag_parallel(big.radius, big.height) > 4.0


def test_gap_parameter_sets_the_height():
    b = Body("b", 2e-6, 1050.0, gap=50e-9)
    assert b.height == pytest.approx(2.05e-6, rel=1e-15, abs=0) and b.gap == 50e-9
    assert Body("b", 2e-6, 1050.0, height=2.05e-6, gap=50e-9).height == 2.05e-6
    assert b == Body("b", 2e-6, 1050.0, height=b.height)          # equality is decided by the height
    assert hash(b) == hash(Body("b", 2e-6, 1050.0, height=b.height))
    assert len({b, Body("b", 2e-6, 1050.0, height=b.height)}) == 1
    with pytest.raises(dataclasses.FrozenInstanceError):
        b.gap = 1e-9


def test_replacing_the_radius_keeps_the_height():
    # fieldplan.calibration.calibrate fits body.radius through dataclasses.replace; the height stays put.
    b = Body("b", 3e-6, 1100.0, height=5e-6)
    assert dataclasses.replace(b, radius=2e-6).height == 5e-6
    g = Body("b", 3e-6, 1100.0, gap=1e-7)
    assert dataclasses.replace(g, radius=2e-6, height=None).height == pytest.approx(2.1e-6, rel=1e-15, abs=0)


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(radius=1e-6, density=1000.0, height=1e-6), "touching the floor"),
    (dict(radius=1e-6, density=1000.0, gap=0.0), "gap"),
    (dict(radius=1e-6, density=1000.0, gap=-1e-9), "gap"),
    (dict(radius=1e-6, density=1000.0, height=2e-6, gap=1e-7), "disagree"),
])
def test_bad_gaps(kwargs, fragment):
    with pytest.raises(FieldplanError, match=fragment):
        Body("b", **kwargs)


def test_drag_uses_the_resting_gap():
    w = water()
    b = Body("b", 10e-6, 1050.0, gap=10e-9)
    assert drag_coefficient(b, w) == pytest.approx(stokes_drag(10e-6, w.viscosity) * wall_drag_parallel(10e-6, 10.01e-6),
                                                  rel=1e-9, abs=0)


def test_scenario_gap_key_round_trips():
    from fieldplan.scenario import dump_scenario, load_scenario
    text = textwrap.dedent("""\
        name: gap
        workspace: {boundary: {rectangle: [0, 0, 1 mm, 1 mm]}}
        medium: {preset: water}
        bodies:
          - {kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3, gap: 20 nm}
          - {kind: big, radius: 50 um, density: 1050 kg/m^3}
        starts: [[0.2 mm, 0.2 mm], [0.8 mm, 0.2 mm], [0.5 mm, 0.6 mm]]
        goals: [[0.2 mm, 0.8 mm], [0.8 mm, 0.8 mm], [0.5 mm, 0.3 mm]]
        actuator:
          type: source-array
          sources: [[0, 0], [1 mm, 0], [0, 1 mm], [1 mm, 1 mm]]
          force: 2 pN
        """)
    sc = load_scenario(text, name="gap.yaml")
    assert sc.bodies[0].height == pytest.approx(5.02e-6, rel=1e-12, abs=0)
    assert sc.bodies[2].clearance == pytest.approx(DEFAULT_GAP, rel=1e-6, abs=0)
    back = load_scenario(dump_scenario(sc), name="again.yaml")
    assert back.bodies == sc.bodies
    with pytest.raises(Exception, match="gap"):
        load_scenario(text.replace("gap: 20 nm", "gap: -20 nm"), name="bad.yaml")
