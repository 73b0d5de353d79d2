"""Scenario files: YAML with line numbers, schema validation, object building and round trips."""

import pathlib
import textwrap

import numpy as np
import pytest

from fieldplan import Body, ScenarioError, Workspace
from fieldplan.contract.testing import SourceArray
from fieldplan.scenario import (
    SCHEMA,
    dump_scenario,
    key_string,
    load_scenario,
    read_yaml,
    scenario_to_dict,
    schema_reference,
)

BASE = textwrap.dedent("""\
    name: base
    workspace:
      boundary: {rectangle: [0, 0, 1 mm, 1 mm]}
      obstacles:
        - circle: {center: [0.5 mm, 0.5 mm], radius: 0.1 mm}
    medium: {preset: water, temperature: 25 degC}
    bodies:
      - {kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3}
    starts: [[0.2 mm, 0.2 mm], [0.8 mm, 0.2 mm]]
    goals: [[0.2 mm, 0.8 mm], [0.8 mm, 0.8 mm]]
    actuator:
      type: source-array
      sources: [[0, 0], [1 mm, 0], [0, 1 mm], [1 mm, 1 mm]]
      force: 2 pN
    limits:
      time_step: 1 ms
      channels:
        source_1: {upper: 0.5, slew_rate: 100}
    planner: {tolerance: 10 um}
    simulation: {trials: 2, seed: 3}
    """)


def load(text, name="t.yaml"):
    return load_scenario(text, name=name)


def problems(text):
    with pytest.raises(ScenarioError) as err:
        load(text)
    return err.value.problems


def line_of(text, needle):
    """1-based line of the first line containing ``needle`` (so tests do not hard-code line numbers)."""
    for i, ln in enumerate(text.splitlines(), 1):
        if needle in ln:
            return i
    raise AssertionError(needle)


def test_base_builds_objects_in_si():
    sc = load(BASE)
    assert len(sc.bodies) == 2 and all(isinstance(b, Body) for b in sc.bodies)
    assert sc.bodies[0].radius == pytest.approx(5e-6)
    assert isinstance(sc.workspace, Workspace) and len(sc.workspace.obstacles) == 1
    # IAPWS R12-08: water at 25 degC has 0.89002 mPa s (CHECKS.md); the medium module's correlation
    # agrees to better than 0.1 %.
    assert sc.medium.viscosity == pytest.approx(0.89002e-3, rel=1e-3)
    assert isinstance(sc.actuator, SourceArray) and sc.actuator.force == pytest.approx(2e-12)
    np.testing.assert_allclose(sc.actuator.sources[3], [1e-3, 1e-3])
    np.testing.assert_allclose(sc.starts, [[2e-4, 2e-4], [8e-4, 2e-4]])
    lim = sc.limits.get("source_1")
    assert lim.upper == 0.5 and lim.slew_rate == 100 and lim.lower == -1.0
    assert sc.limits.time_step == pytest.approx(1e-3)
    assert sc.planner == {"tolerance": pytest.approx(1e-5)}
    assert sc.simulation.trials == 2 and sc.simulation.seed == 3
    assert len(sc.digest) == 64


def test_read_yaml_records_lines_and_fixes_exponent_floats():
    doc = read_yaml("a:\n  b: 1e-6\n  c:\n    - x\n    - {d: 2}\n", "f.yaml")
    assert doc.data == {"a": {"b": 1e-6, "c": ["x", {"d": 2}]}}
    assert doc.line(("a", "b")) == 2 and doc.line(("a", "c", 1, "d")) == 5
    assert doc.line(("a", "missing")) == 1     # falls back to the parent's line
    assert key_string(("bodies", 0, "radius")) == "bodies[0].radius"


def test_safe_loader_refuses_python_tags():
    text = BASE + "extra: !!python/object/apply:os.system ['true']\n"
    with pytest.raises(ScenarioError) as err:
        load(text)
    assert err.value.problems[0][2] == "extra" and "python/object" in err.value.problems[0][3]


def test_every_problem_is_reported_at_once_with_suggestions():
    text = (BASE.replace("radius: 5 um", "raduis: 5 um")
                .replace("force: 2 pN", "forse: 2 pN")
                .replace("simulation:", "simulaton:"))
    ps = problems(text)
    keys = {p[2] for p in ps}
    assert "simulaton" in keys
    assert "bodies[0].raduis" in keys
    assert "actuator.forse" in keys
    msgs = " ".join(p[3] for p in ps)
    assert "Did you mean 'simulation'" in msgs and "Did you mean 'radius'" in msgs and "Did you mean 'force'" in msgs
    by_key = {p[2]: p for p in ps}
    assert by_key["simulaton"][1] == line_of(text, "simulaton")
    assert by_key["actuator.forse"][1] == line_of(text, "forse")
    assert all(p[0] == "t.yaml" for p in ps)


def test_units_are_checked_by_dimension():
    ps = problems(BASE.replace("radius: 5 um", "radius: 5 A"))
    assert ps[0][2] == "bodies[0].radius" and "expected a quantity in m" in ps[0][3]
    # actuator parameters are checked against the unit their docstring states ("Peak force scale, N")
    ps = problems(BASE.replace("force: 2 pN", "force: 2 mm"))
    assert ps[0][2] == "actuator.force" and "N" in ps[0][3]


def test_plain_numbers_are_si_and_strings_may_carry_units():
    a = load(BASE)
    b = load(BASE.replace("radius: 5 um", "radius: 5.0e-6").replace("force: 2 pN", "force: 2e-12"))
    assert a.bodies[0].radius == pytest.approx(b.bodies[0].radius)
    assert a.actuator.force == pytest.approx(b.actuator.force)


def test_random_starts_are_seeded_and_valid():
    text = BASE.replace("starts: [[0.2 mm, 0.2 mm], [0.8 mm, 0.2 mm]]",
                        "starts: {random: {region: {rectangle: [0, 0, 1 mm, 0.3 mm]}, seed: 5, separation: 50 um}}")
    a, b = load(text), load(text)
    np.testing.assert_array_equal(a.starts, b.starts)
    assert np.all(a.starts[:, 1] <= 3e-4) and np.linalg.norm(a.starts[0] - a.starts[1]) >= 5e-5
    assert np.all(a.workspace.contains(a.starts, 5e-6))
    c = load(text.replace("seed: 5", "seed: 6"))
    assert not np.array_equal(a.starts, c.starts)


def test_unlabelled_goals_and_planner_settings():
    text = BASE.replace("goals: [[0.2 mm, 0.8 mm], [0.8 mm, 0.8 mm]]",
                        "goals: {positions: [[0.2 mm, 0.8 mm], [0.8 mm, 0.8 mm]], unlabelled: true}")
    text = text.replace("planner: {tolerance: 10 um}", "planner: {tolerance: 10 um, period: 0.5 s, horizon: 2}")
    sc = load(text)
    assert sc.assign_goals
    st = sc.plan_settings()
    assert st.assign_goals and st.horizon == 2 and st.period == pytest.approx(0.5)


def test_truth_inherits_and_overrides_parameters():
    sc = load(BASE + "truth: {force: 2.4 pN}\n")
    assert sc.truth.force == pytest.approx(2.4e-12)
    np.testing.assert_allclose(sc.truth.sources, sc.actuator.sources)
    assert sc.truth_actuator is sc.truth


def test_truth_with_other_channels_is_refused():
    ps = problems(BASE + "truth: {type: source-array, sources: [[0, 0], [1 mm, 0]]}\n")
    assert ps[0][2] == "truth" and "channels" in ps[0][3]


def test_variants_replace_sections_and_report_their_own_lines():
    text = BASE + textwrap.dedent("""\
        variants:
          - name: strong
            actuator: {force: 4 pN}
          - name: three-sources
            actuator: {type: source-array, sources: [[0, 0], [1 mm, 0], [0.5 mm, 1 mm]], force: 2 pN}
            limits: {time_step: 1 ms}
        """)
    sc = load(text)
    assert [v.name for v in sc.variants] == ["base/strong", "base/three-sources"]
    assert sc.variants[0].actuator.force == pytest.approx(4e-12)
    assert len(sc.variants[1].actuator.channels) == 3
    bad = text.replace("actuator: {force: 4 pN}", "actuator: {forse: 4 pN}")
    ps = problems(bad)
    assert ps[0][2] == "variants[0].actuator.forse" and ps[0][1] == line_of(bad, "forse")


def test_limits_for_channels_and_all_channels():
    text = BASE.replace("    source_1: {upper: 0.5, slew_rate: 100}",
                        "    source_1: {upper: 0.5, slew_rate: 100}\n  all_channels: {rms: 0.4, rms_window: 2 s}")
    sc = load(text)
    for name in ("source_1", "source_4"):
        assert sc.limits.get(name).rms == pytest.approx(0.4) and sc.limits.get(name).rms_window == pytest.approx(2)
    assert sc.limits.get("source_1").upper == 0.5 and sc.limits.get("source_2").upper == 1.0


def test_round_trip_object_yaml_object():
    sc = load(BASE + "truth: {force: 2.4 pN}\n")
    text = dump_scenario(sc)
    back = load(text, name="again.yaml")
    assert back.bodies == sc.bodies
    assert back.workspace.boundary.equals(sc.workspace.boundary)
    assert all(a.equals_exact(b, 1e-15) for a, b in zip(back.workspace.obstacles, sc.workspace.obstacles))
    assert back.medium == sc.medium
    np.testing.assert_array_equal(back.starts, sc.starts)
    np.testing.assert_array_equal(back.goals, sc.goals)
    assert back.limits.to_dict() == sc.limits.to_dict()
    assert back.planner == sc.planner and back.simulation == sc.simulation and back.outputs == sc.outputs
    xy = np.array([[3e-4, 4e-4], [6e-4, 7e-4]])
    u = np.array([0.3, -0.2, 0.1, 0.5])
    for a, b in ((sc.actuator, back.actuator), (sc.truth, back.truth)):
        np.testing.assert_array_equal(a.velocity(sc.bodies[0], sc.medium, xy, u),
                                      b.velocity(back.bodies[0], back.medium, xy, u))
    assert scenario_to_dict(back) == scenario_to_dict(sc) | {"name": back.name}


def test_round_trip_of_a_scenario_built_in_code():
    """A scenario assembled from objects (no source file) writes its actuator by introspection."""
    sc = load(BASE)
    sc.config = {}
    back = load(dump_scenario(sc), name="again.yaml")
    np.testing.assert_allclose(back.actuator.sources, sc.actuator.sources)
    assert back.actuator.core == sc.actuator.core


def test_schema_reference_lists_every_key():
    ref = schema_reference()
    for section, keys in SCHEMA.items():
        for k in keys:
            assert f"`{k.name}`" in ref, (section, k.name)


def test_nested_objects_are_built_from_mappings():
    """Built-in actuators with nested objects (coils) are built from plain mappings with units."""
    pytest.importorskip("fieldplan.actuators.magnetic")
    text = textwrap.dedent("""\
        workspace: {boundary: {rectangle: [-2 mm, -2 mm, 2 mm, 2 mm]}}
        bodies: [{kind: magnet, radius: 100 um, density: 7500 kg/m^3, moment: [0, 0, 1e-9]}]
        starts: [[0, 0]]
        goals: [[1 mm, 0]]
        actuator:
          type: coil-array
          bead_models: fixed
          coils:
            - {center: [-6 mm, 0, -2 mm], axis: [0, 0, 1], radius: 3 mm, turns: 100, current_limit: 1 A}
            - {center: [6 mm, 0, -2 mm], axis: [0, 0, 1], radius: 3 mm, turns: 100, current_limt: 1 A}
        """)
    ps = problems(text)
    assert ps[0][2] == "actuator.coils[1].current_limt" and "Did you mean 'current_limit'" in ps[0][3]
    assert ps[0][1] == line_of(text, "current_limt")
    sc = load(text.replace("current_limt", "current_limit"))
    assert [c.name for c in sc.actuator.channels] == ["coil_1", "coil_2"]
    assert sc.actuator.coils[0].radius == pytest.approx(3e-3)
    assert sc.actuator.coils[1].center == pytest.approx((6e-3, 0.0, -2e-3))


@pytest.mark.parametrize("name", ["demo", "coils", "electrodes", "plate", "mismatch"])
def test_shipped_scenarios_round_trip(name):
    """object -> YAML -> object for the built-in actuators: same bodies, limits and velocities."""
    import pathlib

    path = pathlib.Path(__file__).resolve().parents[2] / "scenarios" / f"{name}.yaml"
    sc = load_scenario(str(path))
    back = load(dump_scenario(sc), name="again.yaml")
    assert back.bodies == sc.bodies and back.medium == sc.medium
    assert back.limits.to_dict() == sc.limits.to_dict() and back.planner == sc.planner and back.mode == sc.mode
    assert [c for c in back.actuator.channels] == [c for c in sc.actuator.channels]
    prim = sc.actuator.primitives()[0].values
    xy = np.vstack([sc.starts, sc.goals])
    for a, b in ((sc.actuator, back.actuator), (sc.truth_actuator, back.truth_actuator)):
        for body in {x.name: x for x in sc.bodies}.values():
            np.testing.assert_allclose(b.velocity(body, back.medium, xy, prim),
                                       a.velocity(body, sc.medium, xy, prim), rtol=1e-12, atol=0)


COILS = textwrap.dedent("""\
    workspace: {boundary: {rectangle: [-2 mm, -2 mm, 2 mm, 2 mm]}}
    bodies: [{kind: magnet, radius: 100 um, density: 7500 kg/m^3, moment: [0, 0, 1e-9]}]
    starts: [[0, 0]]
    goals: [[1 mm, 0]]
    actuator:
      type: coil-array
      bead_models: fixed
      coils:
        - {center: [-6 mm, 0, -2 mm], axis: [0, 0, 1], radius: 3 mm, turns: 100, current_limit: 1 A,
           rms_current: 0.6 A, thermal_time_constant: 2 s}
        - {center: [6 mm, 0, -2 mm], axis: [0, 0, 1], radius: 3 mm, turns: 100, current_limit: 1 A}
    """)


def test_limits_start_from_what_the_actuator_declares():
    """The coil's RMS rating reaches the scenario's limits without being repeated there."""
    pytest.importorskip("fieldplan.actuators.magnetic")
    sc = load(COILS)
    assert sc.limits.get("coil_1").rms == pytest.approx(0.6) and sc.limits.get("coil_1").rms_window == 2.0
    assert sc.limits.get("coil_2").rms is None
    assert sc.limits.get("coil_1").upper == pytest.approx(1.0)
    # with a limits section too: the declared RMS stays, the scenario adds its own
    sc = load(COILS + "limits:\n  all_channels: {slew_rate: 50 A/s}\n")
    assert sc.limits.get("coil_1").rms == pytest.approx(0.6) and sc.limits.get("coil_2").slew_rate == 50.0


def test_a_scenario_may_tighten_a_declared_limit_but_not_loosen_it():
    pytest.importorskip("fieldplan.actuators.magnetic")
    sc = load(COILS + "limits:\n  channels:\n    coil_1: {rms: 0.4 A, rms_window: 1 s}\n")
    assert sc.limits.get("coil_1").rms == pytest.approx(0.4) and sc.limits.get("coil_1").rms_window == 1.0
    text = COILS + "limits:\n  channels:\n    coil_1: {rms: 0.9 A}\n"
    ps = problems(text)
    assert ps[0][2] == "limits.channels.coil_1.rms" and "looser than the 0.6 A that CoilArray declares" in ps[0][3]
    assert ps[0][1] == line_of(text, "rms: 0.9 A")
    text = COILS + "limits:\n  all_channels: {rms: 0.5 A, rms_window: 5 s}\n"
    ps = problems(text)
    assert [p[2] for p in ps] == ["limits.all_channels.rms_window"]     # coil_2 declares no RMS: any window


def test_the_shipped_coil_scenario_gets_its_rms_limit_from_the_coils():
    pytest.importorskip("fieldplan.actuators.magnetic")
    path = pathlib.Path(__file__).resolve().parents[2] / "scenarios" / "coils.yaml"
    assert "rms: 1.5 A" not in path.read_text()
    sc = load_scenario(path)
    assert all(sc.limits.get(c.name).rms == pytest.approx(1.5) for c in sc.actuator.channels)
    assert all(sc.limits.get(c.name).rms_window == pytest.approx(2.0) for c in sc.actuator.channels)
