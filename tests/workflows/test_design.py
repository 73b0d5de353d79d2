"""Tests of fieldplan.workflows.design: the design search over free actuator keys and kept subsets.

Checks against outside facts:
- plate mirror symmetry (shared/PHYSICS-NOTES.md, "Symmetry limits what any controller can do"):
  a post at the centre of a free square plate excites only modes symmetric under the plate's four
  mirror lines, so a mirror-image pair cannot be separated; the search must move the post off them;
- the k best of M evenly spaced uniform directions (closed form derived below);
- seeded runs are reproducible; the best never scores below the start; bad sections are refused
  naming file, line and key.
"""

import csv
import io
import math
import os

import numpy as np
import pytest

from fieldplan import Actuator, Channel, Primitive
from fieldplan.workflows.design import MAX_EVALUATIONS, load_design, search, write_design
from fieldplan.errors import ScenarioError
from fieldplan.scenario import load_scenario
from fieldplan.analysis import basis_function, mirror_check

FULL = os.environ.get("FIELDPLAN_FULL") == "1"
HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))


class UniformTones(Actuator):
    """Test actuator: primitive j moves every body with the same velocity ``speed * (cos a_j, sin a_j)``.

    Parameters
    ----------
    angles : sequence of float
        Directions of the primitives, rad.
    speed : float
        Speed of every primitive, m/s.
    """

    tags = frozenset({"zero_idle"})

    def __init__(self, angles=(0.0, 1.0, 2.0), speed=1e-5):
        self.angles = [float(a) for a in angles]
        self.speed = float(speed)
        self.extent = (-1e-3, 1e-3, -1e-3, 1e-3)

    @property
    def channels(self):
        return (Channel("angle", "rad", -10.0, 10.0), Channel("amplitude", "1", 0.0, 1.0))

    def primitives(self):
        return tuple(Primitive(f"{a:.4f}rad", (a, 1.0)) for a in self.angles)

    def _velocity(self, body, medium, xy, u):
        v = self.speed * u[1] * np.array([math.cos(u[0]), math.sin(u[0])])
        return np.tile(v, (len(xy), 1))


def toy_text(M=12, k=4, evaluations=60, seed=0, extra=""):
    angles = ", ".join(f"{2 * math.pi * j / M!r}" for j in range(M))
    return f"""
workspace: {{boundary: {{rectangle: [-1 mm, -1 mm, 1 mm, 1 mm]}}}}
bodies: [{{kind: bead, count: 1, radius: 5 um, density: 1050 kg/m^3}}]
starts: [[0, 0]]
goals: [[0.5 mm, 0]]
actuator: {{type: "test_design:UniformTones", angles: [{angles}], speed: 1e-5}}
design:
  objective: worst_speed
  statistic: min
  grid: 3
  evaluations: {evaluations}
  seed: {seed}
  keep: {{key: angles, count: {k}}}
{extra}"""


def load_toy(**kw):
    return load_design(toy_text(**kw), allow_modules=("test_design",))


def test_best_k_of_m_uniform_directions_are_evenly_spread():
    """Closed form (derived here). Primitive j gives the uniform velocity v u_j, |u_j| = 1, and time
    sharing reaches V = conv{0, v u_j}. The worst-direction speed is the distance from 0 to the
    nearest edge of conv{v u_j} (0 inside when the kept directions positively span the plane): an
    edge between neighbouring directions an angle D < pi apart lies at v cos(D / 2) from 0. So the
    speed is v cos(D_max / 2), D_max the largest gap between neighbouring kept directions; since the
    k gaps sum to 2 pi, D_max >= 2 pi / k with equality exactly for evenly spaced directions, which
    are therefore the unique optimum (up to rotation), with speed v cos(pi / k).
    M = 12 directions 30 degrees apart, k = 4: the optimum keeps every third, speed v cos(45 deg)."""
    sc, spec = load_toy(M=12, k=4)
    res = search(sc, spec, progress=False)
    assert spec.keep.fields                          # the items are the primitives one for one
    v = 1e-5
    assert res.start.score == 0.0                    # first four: 0..90 degrees, a 270-degree gap
    assert res.best.score == pytest.approx(v * math.cos(math.pi / 4), rel=1e-9)
    kept = sorted(res.best.kept)
    assert np.all(np.diff(kept) == 3), kept
    # Every candidate's score obeys the closed form too (a check of the objective, not only the search).
    for c in res.candidates:
        ang = np.sort(np.array(c.kept) * 2 * math.pi / 12)
        gaps = np.diff(np.r_[ang, ang[0] + 2 * math.pi])
        expect = v * math.cos(gaps.max() / 2) if gaps.max() < math.pi else 0.0
        assert c.score == pytest.approx(expect, rel=1e-7, abs=1e-12)
    assert len(res.candidates) <= spec.evaluations
    # The written scenario keeps exactly those directions and loads as a plain scenario.
    best = load_scenario_text(res)
    assert best.actuator.angles == pytest.approx([2 * math.pi * j / 12 for j in kept])


def load_scenario_text(res):
    from fieldplan.scenario import dump_scenario

    return load_scenario(dump_scenario(res.best_scenario), allow_modules=("test_design",))


def test_seeded_runs_are_reproducible_and_never_below_the_start():
    runs = [search(*load_toy(M=10, k=3, evaluations=25, seed=4), progress=False) for _ in range(2)]
    assert runs[0].table_csv() == runs[1].table_csv()
    for r in runs:
        assert r.best.score >= r.start.score
        assert r.best.score == max(c.score for c in r.candidates if c.feasible)
    # A start that is already optimal stays the answer (ties go to the start).
    sc, spec = load_toy(M=8, k=4, evaluations=12)
    spec.keep.items = [spec.keep.items[i] for i in (0, 2, 4, 6, 1, 3, 5, 7)]
    spec.keep.labels = [spec.keep.labels[i] for i in (0, 2, 4, 6, 1, 3, 5, 7)]
    res = search(sc, spec, progress=False)
    assert res.best.index == 0 and res.best.score == pytest.approx(1e-5 * math.cos(math.pi / 4))


def test_continuous_search_on_the_toy_moves_a_direction_into_the_gap():
    """One free angle among three fixed ones (0, 90, 180 degrees): the gap 180..360 degrees is closed
    best by putting the free direction at 270 degrees (gaps all 90 deg: v cos 45 deg)."""
    text = toy_text(M=4, k=3, evaluations=40, extra="  search: evolution\n")
    text = text.replace("keep: {key: angles, count: 3}", 'free: {"angles[3]": {range: [3.2, 6.2], unit: rad}}')
    sc, spec = load_design(text.replace(f"{2 * math.pi * 3 / 4!r}", "3.3"), allow_modules=("test_design",))
    res = search(sc, spec, progress=False)
    assert res.best.score >= res.start.score
    assert res.best.x[0] == pytest.approx(3 * math.pi / 2, abs=0.15)
    assert res.best.score == pytest.approx(1e-5 * math.cos(math.pi / 4), rel=0.01)
    for algo in ("annealing", "random"):
        sc2, spec2 = load_design(text.replace(f"{2 * math.pi * 3 / 4!r}", "3.3").replace("evolution", algo),
                                 allow_modules=("test_design",))
        r2 = search(sc2, spec2, progress=False)
        assert len(r2.candidates) <= spec2.evaluations
        assert r2.best.score >= r2.start.score


PLATE = """
name: sym-plate
workspace: {boundary: {rectangle: [-90 mm, -90 mm, 90 mm, 90 mm]}}
medium: {preset: air, temperature: 22 degC}
bodies: [{kind: sand, count: 2, radius: 0.5 mm, density: 2600 kg/m^3}]
starts: [[-40 mm, 25 mm], [40 mm, 25 mm]]
goals: [[-40 mm, -25 mm], [40 mm, 35 mm]]
actuator: {type: plate, length_x: 200 mm, length_y: 200 mm, thickness: 1 mm, edges: free,
           supports: [[0 mm, 0 mm]], excitation: base, band: [150 Hz, 900 Hz], n_tones: 10,
           peak_displacement: 30 um, use_grid: false}
design:
  objective: steerable_fraction
  count: 2
  trials: 8
  evaluations: %d
  search: evolution
  free: {"supports[0][0]": [-70 mm, 70 mm], "supports[0][1]": [-70 mm, 70 mm]}
  constraints: {edge_margin: {points: "supports[*]", margin: 20 mm}}
"""

MIRRORS = [((0, 0), (1, 0)), ((0, 0), (0, 1)), ((0, 0), (1, 1)), ((0, 0), (1, -1))]


def test_symmetric_plate_search_moves_the_post_off_every_mirror_line():
    """PHYSICS-NOTES.md (symmetry): the centre post keeps every field symmetric under the square's
    four mirror lines, so a grain pair at mirror images is inseparable (mirror_check); the best design
    found must break all four."""
    sc, spec = load_design(PLATE % (20 if FULL else 8))
    res = search(sc, spec, progress=False)
    assert res.best.score > res.start.score
    bx, by = res.best_scenario.actuator.supports[0][:2]
    for d in (bx, by, (bx - by) / math.sqrt(2), (bx + by) / math.sqrt(2)):
        assert abs(d) > 2e-3                          # more than 2 mm off each mirror line
    start_fn = basis_function(res.start_scenario.actuator, sc.bodies[0], sc.medium)
    best_fn = basis_function(res.best_scenario.actuator, sc.bodies[0], sc.medium)
    # A mirror pair may also be blocked for reasons other than symmetry (a dead spot of this tone
    # set), so the best design must separate a pair for each line at one of a few places at least;
    # the centre post separates none anywhere.
    points = [(0.05, 0.02), (-0.02, 0.045), (0.031, 0.012)]
    for lp, ld in MIRRORS:
        assert not any(mirror_check(start_fn, p, lp, ld).pair_separable for p in points)
        assert any(mirror_check(best_fn, p, lp, ld).pair_separable for p in points), (lp, ld)
    # The plate-edge constraint held for every candidate it allowed.
    for c in res.candidates:
        if c.feasible:
            assert max(abs(c.x[0]), abs(c.x[1])) <= 0.08 + 1e-12


def test_coil_ring_bias_moves_off_the_ring_axis():
    """Four vertical coils on a ring, soft beads, a 4 mT uniform bias on the ring's axis: tilting the
    bias adds a linear term 2 B0 . b_k to |B|^2 that differs between coils (measured during
    development: mean worst-direction speed 2.2 um/s on axis, 2.7 um/s with 3 mT in plane). The search
    must end off the axis with a higher score."""
    text = """
workspace: {boundary: {circle: {center: [0, 0], radius: 3 mm}}}
medium: {preset: water, temperature: 21 degC}
bodies: [{kind: bead, count: 1, radius: 2.5 um, density: 1800 kg/m^3, susceptibility: 1.0}]
starts: [[0, 0]]
goals: [[1 mm, 0]]
actuator:
  type: coil-array
  plane_height: 0 mm
  bead_models: linear
  primitives: singles
  bias: [0 T, 0 T, 4 mT]
  coils:
    - {center: [6 mm, 0 mm, -3 mm], axis: [0, 0, 1], radius: 3 mm, turns: 300, length: 4 mm, current_limit: 2 A}
    - {center: [0 mm, 6 mm, -3 mm], axis: [0, 0, 1], radius: 3 mm, turns: 300, length: 4 mm, current_limit: 2 A}
    - {center: [-6 mm, 0 mm, -3 mm], axis: [0, 0, 1], radius: 3 mm, turns: 300, length: 4 mm, current_limit: 2 A}
    - {center: [0 mm, -6 mm, -3 mm], axis: [0, 0, 1], radius: 3 mm, turns: 300, length: 4 mm, current_limit: 2 A}
design:
  objective: worst_speed
  grid: 10
  evaluations: 16
  search: evolution
  free: {"bias[0]": [-3 mT, 3 mT], "bias[1]": [-3 mT, 3 mT]}
  constraints: {max_current: 2 A}
"""
    sc, spec = load_design(text)
    assert [p.unit for p in spec.free] == ["T", "T"]
    res = search(sc, spec, progress=False)
    assert res.best.score > 1.1 * res.start.score
    assert math.hypot(*res.best.x) > 1e-3
    assert res.best_scenario.actuator.bias is not None


@pytest.mark.parametrize("patch, key, words", [
    ("  fre: {}\n", "design.fre", "Did you mean 'free'"),
    ("  objective: fastest\n", "design.objective", "expected one of"),
    ('  free: {"angles[20]": [0, 1]}\n', "design.free.angles[20]", "does not exist"),
    ('  free: {"speeds": [0, 1]}\n', "design.free.speeds", "did you mean 'speed'"),
    ('  free: {"speed": [1 mm/s, 1 km/s]}\n', "design.free.speed", "check the unit"),
    ('  free: {"speed": [1 um/s, 5 um/s]}\n', "design.free.speed", "outside the range"),
    ('  free: {"speed": [2 A, 3 A]}\n', "design.free.speed", "cannot read the range"),
    ('  free: {"speed": [5, 1]}\n', "design.free.speed", "lo < hi"),
    (f"  trials: {10**7}\n", "design.trials", "must lie in"),
    ("  constraints: {min_spacing: 3 mm}\n", "design.constraints.min_spacing", "expected {points"),
    ("  constraints: {max_total_power: 3 W}\n", "design.constraints.max_total_power", "power"),
    ("  constraints: {heat: 3 W}\n", "design.constraints.heat", "unknown constraint"),
])
def test_bad_design_sections_name_file_key_and_line(patch, key, words):
    text = with_patch(toy_text(M=6, k=3), patch)
    with pytest.raises(ScenarioError) as err:
        load_design(text, allow_modules=("test_design",))
    msg = str(err.value)
    assert key in msg and words in msg, msg
    line = text.splitlines().index(patch.rstrip("\n")) + 1      # the patched line, at the end of the file
    assert f"<scenario>:{line}, key '{key}'" in msg, msg


def with_patch(text, patch):
    """``text`` with the design key of ``patch`` replaced (or added)."""
    name = patch.strip().split(":")[0]
    lines = [t for t in text.splitlines() if t.strip().split(":")[0] != name or not t.startswith("  ")]
    return "\n".join(lines) + "\n" + patch


def test_budget_and_keep_counts_are_bounded():
    with pytest.raises(ScenarioError, match=r"design\.evaluations.*must lie in"):
        load_design(with_patch(toy_text(M=6, k=3), f"  evaluations: {MAX_EVALUATIONS + 1}\n"),
                    allow_modules=("test_design",))
    with pytest.raises(ScenarioError, match=r"design\.evaluations.*exceeds"):
        load_design(with_patch(with_patch(toy_text(M=6, k=3), "  evaluations: 5000\n"), "  grid: 200\n"),
                    allow_modules=("test_design",))
    with pytest.raises(ScenarioError, match=r"design\.keep\.count"):
        load_design(toy_text(M=6, k=6), allow_modules=("test_design",))
    with pytest.raises(ScenarioError, match="no 'design:' section"):
        load_design(toy_text().split("\ndesign:")[0], allow_modules=("test_design",))
    # fieldplan run ignores the design section: the file is an ordinary scenario too.
    assert load_scenario(toy_text(), allow_modules=("test_design",)).actuator.speed == 1e-5


def test_design_command_writes_a_ready_scenario_table_and_plots(tmp_path):
    from fieldplan.cli import main

    src = tmp_path / "toy.yaml"
    src.write_text(toy_text(M=8, k=4, evaluations=20))
    out = tmp_path / "out"
    argv = ["design", str(src), "--out", str(out), "--workers", "1", "--allow-module", "test_design", "-q"]
    assert main(argv) == 0
    names = sorted(os.listdir(out))
    for f in ("best.yaml", "candidates.csv", "design.json", "objective.png", "speed_maps.png", "count_curves.png"):
        assert f in names
    best = load_scenario(str(out / "best.yaml"), allow_modules=("test_design",))
    assert len(best.actuator.angles) == 4
    rows = list(csv.reader(io.StringIO((out / "candidates.csv").read_text())))
    assert rows[0][:4] == ["index", "phase", "feasible", "score [m/s]"] and len(rows) == 21
    # An existing folder is refused without --force, and a folder of the user's is never replaced.
    assert main(argv) == 2
    assert main(argv + ["--force"]) == 0
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep me")
    assert main(["design", str(src), "--out", str(mine), "--force", "--workers", "1",
                 "--allow-module", "test_design", "-q"]) == 2
    assert (mine / "notes.txt").read_text() == "keep me"


def test_parallel_evaluation_matches_inline():
    """The same candidates and scores whether evaluated in this process or on worker processes."""
    from fieldplan.compare import make_executor

    sc, spec = load_design(os.path.join(ROOT, "scenarios", "design-coils.yaml"))
    spec.evaluations = 8
    spec.trials = 6
    inline = search(sc, spec, progress=False)
    with make_executor(None, 2) as ex:
        par = search(sc, spec, executor=ex, progress=False)
    assert inline.table_csv() == par.table_csv()


def test_write_design_is_atomic(tmp_path, monkeypatch):
    """A failure while plotting leaves no output folder behind."""
    import fieldplan.workflows.design as design

    sc, spec = load_toy(M=6, k=3, evaluations=6)
    res = search(sc, spec, progress=False)

    def boom(result):
        raise RuntimeError("plot failed")

    monkeypatch.setattr(design, "plot_count_curves", boom)
    with pytest.raises(RuntimeError):
        write_design(tmp_path / "out", res)
    assert not (tmp_path / "out").exists()


def test_hardware_constraints_are_enforced_and_reported():
    """Coil spacing, amplifier current and power: infeasible candidates stay in the table with the
    reason, the best is feasible, and an infeasible start is refused naming the broken rule."""
    path = os.path.join(ROOT, "scenarios", "design-coils.yaml")
    text = open(path).read()
    sc, spec = load_design(text)
    spec.evaluations, spec.trials = 14, 4
    res = search(sc, spec, progress=False)
    assert res.best.feasible and res.best.x[1] <= 2.5 + 1e-12       # coils[0].current_limit <= max_current
    bad = [c for c in res.candidates if not c.feasible]
    assert all(("2.5 A" in c.message or "30 W" in c.message) for c in bad)
    assert all(c.x[1] > 2.5 for c in bad)          # 4 kept coils: 1.5 ohm x (I0^2 + 3 x 4 A^2) <= 30 W binds later
    # A ring of six coils 8 mm from the centre has neighbours 8 mm apart: 9 mm spacing is broken.
    tight = text.replace("max_current: 2.5 A", 'min_spacing: {points: "coils[*].center", distance: 9 mm}')
    sc2, spec2 = load_design(tight)
    with pytest.raises(ScenarioError, match=r"start design is infeasible: points 0 and 1 of coils\[\*\]\.center"):
        search(sc2, spec2, progress=False)
