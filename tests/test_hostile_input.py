"""Hostile and careless input (issue 16): no user file is lost, no input exhausts memory or time,
no traceback for the user's own mistake, and checking a file never runs code from it.

Every limit is exercised with a small value set through the module constant, so no test allocates
more than a few megabytes; the default values are checked for being documented in the README.
"""

import json
import os
import pathlib
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pytest
import shapely

import fieldplan.scenario.yamldoc as scenario_mod   # the resource limits live with the reader
from fieldplan import Schedule, Segment
from fieldplan.calibration.tracking import TrackingDataError, read_tracks
from fieldplan.cli import main
from fieldplan.contract.schedule import atomic_write
from fieldplan.errors import ScenarioError
from fieldplan.scenario import load_scenario, read_yaml
from fieldplan.workflows.export import (
    MARKER,
    OutputExistsError,
    OutputFolderError,
    check_output_folder,
    clean_stale_temps,
    output_folder,
    written_by_fieldplan,
)

ROOT = pathlib.Path(__file__).resolve().parents[1]

SCENARIO = textwrap.dedent("""\
    name: hostile
    workspace: {boundary: {rectangle: [0, 0, 1 mm, 1 mm]}}
    bodies: [{kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3}]
    starts: [[0.3 mm, 0.3 mm], [0.7 mm, 0.3 mm]]
    goals: [[0.3 mm, 0.7 mm], [0.7 mm, 0.7 mm]]
    actuator: {type: source-array, sources: [[0, 0], [1 mm, 0], [1 mm, 1 mm]], force: 3 pN}
    planner: {tolerance: 30 um}
    simulation: {trials: 0}
    outputs: {plots: false}
    """)


def problems_of(text, **kw):
    with pytest.raises(ScenarioError) as err:
        load_scenario(text, name="h", **kw)
    return err.value.problems


def no_planning(monkeypatch):
    """Make any planning or simulation fail loudly: refusals must come before them."""
    import fieldplan.workflows.compare as compare

    def boom(*a, **k):
        raise AssertionError("planning started before the output folder was checked")

    monkeypatch.setattr(compare, "run_scenario", boom)
    monkeypatch.setattr(compare, "compare", boom)


# ---------------------------------------------------------------------------------------------
# 1. --force replaces only folders fieldplan wrote
# ---------------------------------------------------------------------------------------------

def test_force_on_the_working_folder_deletes_nothing(tmp_path, monkeypatch, capsys):
    """The reported case: `run base.yaml --out . --force` beside the scenario and a sub/ with notes."""
    (tmp_path / "base.yaml").write_text(SCENARIO)
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "notes.txt").write_text("my notes")
    monkeypatch.chdir(tmp_path)
    no_planning(monkeypatch)
    for out in (".", str(tmp_path), "sub/..", str(tmp_path.parent)):
        assert main(["run", "base.yaml", "--out", out, "--force", "-q"]) == 2
        err = capsys.readouterr().err
        assert "refusing" in err and "Traceback" not in err
    assert (tmp_path / "base.yaml").read_text() == SCENARIO
    assert (tmp_path / "sub" / "notes.txt").read_text() == "my notes"


@pytest.mark.parametrize("command", ["run", "inspect", "compare"])
def test_every_command_refuses_the_folder_holding_its_input(tmp_path, monkeypatch, capsys, command):
    data = tmp_path / "data"
    data.mkdir()
    scen = data / "s.yaml"
    scen.write_text(SCENARIO)
    no_planning(monkeypatch)
    assert main([command, str(scen), "--out", str(data), "--force", "-q"]) == 2
    assert "an input of this run" in capsys.readouterr().err
    assert sorted(os.listdir(data)) == ["s.yaml"]


def test_home_and_folders_fieldplan_did_not_write_are_never_replaced(tmp_path, monkeypatch):
    home = tmp_path / "home"
    home.mkdir()
    monkeypatch.setenv("HOME", str(home))
    with pytest.raises(OutputFolderError, match="home folder"):
        check_output_folder(home, force=True)
    mine = tmp_path / "results"
    mine.mkdir()
    (mine / "thesis.tex").write_text("years of work")
    with pytest.raises(OutputFolderError, match="not written by fieldplan"):
        check_output_folder(mine, force=True)
    with pytest.raises(OutputExistsError, match="--force"):
        check_output_folder(mine, force=False)
    # with the marker it is fieldplan's folder; an empty folder loses nothing either
    (mine / MARKER).write_text("{}")
    check_output_folder(mine, force=True)
    empty = tmp_path / "empty"
    empty.mkdir()
    check_output_folder(empty, force=True)


def test_folders_of_earlier_versions_are_recognised_by_their_file_names(tmp_path):
    old = tmp_path / "old"
    old.mkdir()
    for n in ("schedule.csv", "schedule.json", "summary.json", "trajectories.csv", "inputs.png"):
        (old / n).write_text("x")
    assert written_by_fieldplan(old)
    (old / "notes.txt").write_text("added by the user")          # neighbour: one foreign file
    assert not written_by_fieldplan(old)
    fit = tmp_path / "fit"
    fit.mkdir()
    for n in ("dish.npz", "dish.json", "dish-report.json", "dish-vectors.png"):
        (fit / n).write_text("x")
    assert written_by_fieldplan(fit)
    (fit / "other.json").write_text("x")                          # a JSON file that is not the fit's
    assert not written_by_fieldplan(fit)
    csvs = tmp_path / "csvs"                                       # only generic names: not recognised
    csvs.mkdir()
    (csvs / "trajectories.csv").write_text("x")
    assert not written_by_fieldplan(csvs)


def test_fit_force_means_replace_like_run(tmp_path, capsys):
    tracks = ROOT / "scenarios" / "calibration" / "tracks.csv"
    out = tmp_path / "fit"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    assert main(["fit", str(tracks), "--out", str(out), "--no-plots", "-q"]) == 2
    assert main(["fit", str(tracks), "--out", str(out), "--no-plots", "-q", "--force"]) == 2
    assert "not written by fieldplan" in capsys.readouterr().err
    assert sorted(os.listdir(out)) == ["keep.txt"]
    # the folder holding the tracking file is an input's folder
    assert main(["fit", str(tracks), "--out", str(tracks.parent), "--force", "-q"]) == 2
    assert "an input of this run" in capsys.readouterr().err


# ---------------------------------------------------------------------------------------------
# 2. SIGTERM unwinds like Ctrl-C; stale temporary folders are cleaned by marker and age
# ---------------------------------------------------------------------------------------------

def _replay_args(tmp_path):
    scen = tmp_path / "s.yaml"
    scen.write_text(SCENARIO)
    sc = load_scenario(str(scen))
    sched = tmp_path / "sched.csv"
    Schedule.from_segments(sc.actuator.channels, [Segment(0, 0.5, [0, 0.4, 0])]).write_csv(sched)
    return ["run", str(scen), "--schedule", str(sched), "--trials", "0", "--no-plots", "-q"]


def test_sigterm_while_writing_removes_the_temporary_folder(tmp_path, monkeypatch, capsys):
    import fieldplan.workflows.export as export

    def killed(*a, **k):
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(5)                     # the handler raises before this ends
        raise AssertionError("SIGTERM was not handled")

    monkeypatch.setattr(export, "write_trajectories", killed)
    before = signal.getsignal(signal.SIGTERM)
    code = main(_replay_args(tmp_path) + ["--out", str(tmp_path / "out")])
    assert code == 128 + signal.SIGTERM
    assert "terminated (SIGTERM)" in capsys.readouterr().err
    assert not any(n.startswith(".out.") for n in os.listdir(tmp_path)) and not (tmp_path / "out").exists()
    assert signal.getsignal(signal.SIGTERM) == before      # the handler is only ours while the command runs


SLOW_WRITER = textwrap.dedent("""\
    import pathlib, sys, time
    import fieldplan.workflows.export as export
    from fieldplan.cli import main

    def slow(path, run):          # stands for a long write (an animation, a slow disk)
        pathlib.Path(sys.argv[1]).write_text("writing")
        time.sleep(60)

    export.write_trajectories = slow
    sys.exit(main(sys.argv[2:]))
    """)


@pytest.mark.skipif(os.name != "posix", reason="POSIX signals")
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL], ids=["SIGTERM", "SIGKILL"])
def test_a_real_process_killed_while_writing(tmp_path, sig, capsys):
    """The reported case, in a real process: SIGTERM cleans up and says so; after SIGKILL the next run cleans."""
    script = tmp_path / "slow.py"
    script.write_text(SLOW_WRITER)
    ready = tmp_path / "ready"
    args = _replay_args(tmp_path) + ["--out", str(tmp_path / "out")]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT)] + [os.environ.get("PYTHONPATH", "")]),
               MPLBACKEND="Agg")
    proc = subprocess.Popen([sys.executable, str(script), str(ready)] + args, stderr=subprocess.PIPE, text=True,
                            env=env)
    try:
        deadline = time.monotonic() + 120
        while not ready.exists() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        assert ready.exists(), proc.stderr.read() if proc.poll() is not None else "writer never started"
        assert [n for n in os.listdir(tmp_path) if n.startswith(".out.tmp-")]      # it is writing now
        proc.send_signal(sig)
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    left = [n for n in os.listdir(tmp_path) if n.startswith(".out.")]
    if sig == signal.SIGTERM:
        assert proc.returncode == 128 + signal.SIGTERM and "terminated (SIGTERM)" in err
        assert left == [] and not (tmp_path / "out").exists()
    else:
        assert proc.returncode == -signal.SIGKILL and len(left) == 1     # nothing can run on SIGKILL ...
        assert main(args) in (0, 1)                                       # ... so the next run cleans up
        assert f"removed {left[0]}" in capsys.readouterr().err
        assert [n for n in os.listdir(tmp_path) if n.startswith(".out.")] == []


def test_sigint_still_exits_130(tmp_path, monkeypatch, capsys):
    import fieldplan.workflows.export as export

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(export, "write_trajectories", interrupted)
    assert main(_replay_args(tmp_path) + ["--out", str(tmp_path / "out")]) == 130
    assert not [n for n in os.listdir(tmp_path) if n.startswith(".out.")]


def _temp(parent, name, pid, age=0.0):
    d = parent / name
    d.mkdir()
    (d / MARKER).write_text(json.dumps({"written_by": "fieldplan", "pid": pid, "host": os.uname().nodename}))
    (d / "schedule.csv").write_text("half")
    if age:
        t = time.time() - age
        os.utime(d / MARKER, (t, t))
    return d


def test_stale_temporary_folders_are_cleaned_by_marker_and_age(tmp_path, capsys):
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True).stdout.strip()
    killed = _temp(tmp_path, ".out.tmp-a1", int(dead))            # writer gone: stale
    running = _temp(tmp_path, ".out.tmp-b2", os.getpid())          # writer alive, young: kept
    ancient = _temp(tmp_path, ".out.tmp-c3", os.getpid(), age=3 * 24 * 3600)   # alive pid but days old
    foreign = tmp_path / ".out.tmp-d4"                             # no marker: never touched
    foreign.mkdir()
    other = _temp(tmp_path, ".other.tmp-e5", int(dead))            # another output's: not ours to clean
    old_copy = _temp(tmp_path, ".out.old-f6", int(dead))           # only copy while out/ is missing: kept
    removed = clean_stale_temps(tmp_path / "out")
    assert sorted(removed) == sorted([str(killed), str(ancient)])
    assert running.exists() and foreign.exists() and other.exists() and old_copy.exists()
    (tmp_path / "out").mkdir()
    assert clean_stale_temps(tmp_path / "out") == [str(old_copy)]
    # the command says what it removed
    _temp(tmp_path, ".out2.tmp-g7", int(dead))
    main(_replay_args(tmp_path) + ["--out", str(tmp_path / "out2")])
    assert "removed .out2.tmp-g7" in capsys.readouterr().err


# ---------------------------------------------------------------------------------------------
# 3. An unwritable --out is found before planning, naming the folder
# ---------------------------------------------------------------------------------------------

def test_out_under_a_regular_file_is_refused_before_planning(tmp_path, monkeypatch, capsys):
    (tmp_path / "s.yaml").write_text(SCENARIO)
    (tmp_path / "afile").write_text("x")
    no_planning(monkeypatch)
    assert main(["run", str(tmp_path / "s.yaml"), "--out", str(tmp_path / "afile" / "sub" / "out"), "-q"]) == 2
    err = capsys.readouterr().err
    assert "is a file" in err and str(tmp_path / "afile") in err and ".tmp-" not in err


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root may write into read-only folders")
def test_read_only_parent_is_refused_before_planning(tmp_path, monkeypatch, capsys):
    (tmp_path / "s.yaml").write_text(SCENARIO)
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        no_planning(monkeypatch)
        assert main(["run", str(tmp_path / "s.yaml"), "--out", str(ro / "out"), "-q"]) == 2
        assert "not writable" in capsys.readouterr().err
    finally:
        ro.chmod(0o700)


def test_os_error_while_writing_names_the_output_folder(tmp_path):
    def full(*a):
        raise OSError(28, "No space left on device")

    with pytest.raises(OutputFolderError) as err:
        with output_folder(tmp_path / "out") as tmp:
            atomic_write(os.path.join(tmp, "a.txt"), "x")
            full()
    assert str(tmp_path / "out") in str(err.value) and "No space left" in str(err.value)
    assert sorted(os.listdir(tmp_path)) == []


# ---------------------------------------------------------------------------------------------
# 4. Resource limits on YAML input
# ---------------------------------------------------------------------------------------------

def bomb(levels, width=10, where="a"):
    """A billion-laughs style alias bomb: width**levels strings from a few lines."""
    lines = [f"l0: &l0 [{', '.join(['x'] * width)}]"]
    for k in range(1, levels):
        lines.append(f"l{k}: &l{k} [{', '.join([f'*l{k - 1}'] * width)}]")
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("fast", [True, False], ids=["libyaml", "pure-python"])
def test_alias_bombs_are_refused_quickly(monkeypatch, fast):
    if not fast:
        monkeypatch.setattr(scenario_mod, "_CParser", None)
    monkeypatch.setattr(scenario_mod, "MAX_ALIAS_NODES", 2000)
    cases = {
        "plain": bomb(4),
        "in-a-key": bomb(4) + "? *l3\n: 1\n",
        "in-obstacles": bomb(3) + "workspace: {boundary: {rectangle: [0, 0, 1, 1]}, obstacles: [*l2, *l2, *l2]}\n",
        "in-starts": bomb(3) + "starts: {positions: [*l2, *l2, *l2]}\n",
        "merge-keys": "m0: &m0 {a: 1, b: 2, c: 3, d: 4, e: 5, f: 6, g: 7, h: 8, i: 9, j: 10}\n"
                      + "".join(f"m{k}: &m{k} {{<<: [{', '.join([f'*m{k - 1}'] * 10)}]}}\n" for k in range(1, 5)),
    }
    for name, text in cases.items():
        with pytest.raises(ScenarioError) as err:
            read_yaml(text, "bomb.yaml")
        (file, line, _, msg), = err.value.problems
        assert file == "bomb.yaml" and line is not None, name
        assert "MAX_ALIAS_NODES" in msg or "MAX_NODES" in msg, (name, msg)
    # neighbour: an anchor used a few times is fine
    doc = read_yaml("shape: &s {circle: {center: [1, 1], radius: 0.1}}\nobstacles: [*s, *s]\n")
    assert doc.data["obstacles"][1] == {"circle": {"center": [1, 1], "radius": 0.1}}


@pytest.mark.parametrize("fast", [True, False], ids=["libyaml", "pure-python"])
def test_deep_nesting_is_an_error_not_a_recursion_error(monkeypatch, fast):
    if not fast:
        monkeypatch.setattr(scenario_mod, "_CParser", None)
    for text in ("a: " + "[" * 5000 + "]" * 5000 + "\n", "a:\n" + "".join("  " * k + "- \n" for k in range(1, 200))):
        with pytest.raises(ScenarioError, match="MAX_DEPTH"):
            read_yaml(text, "deep.yaml")
    # depth built from aliases: each anchor nests the one before
    monkeypatch.setattr(scenario_mod, "MAX_DEPTH", 8)
    chain = "l0: &l0 [[[1]]]\n" + "".join(f"l{k}: &l{k} [[[*l{k - 1}]]]\n" for k in range(1, 5))
    with pytest.raises(ScenarioError, match="MAX_DEPTH"):
        read_yaml(chain, "chain.yaml")
    read_yaml("a: [[[[[[1]]]]]]\n")                                # neighbour: 7 deep is fine


def test_node_count_and_file_size_limits(monkeypatch, tmp_path):
    monkeypatch.setattr(scenario_mod, "MAX_NODES", 100)
    with pytest.raises(ScenarioError, match="MAX_NODES"):
        read_yaml("a: [" + ", ".join(["1"] * 200) + "]\n")
    read_yaml("a: [" + ", ".join(["1"] * 50) + "]\n")
    monkeypatch.setattr(scenario_mod, "MAX_FILE_CHARS", 1000)
    big = tmp_path / "big.yaml"
    big.write_text("# " + "x" * 2000 + "\n" + SCENARIO)
    with pytest.raises(ScenarioError, match="MAX_FILE_CHARS"):
        load_scenario(str(big))


def test_a_billion_bodies_is_refused_before_anything_is_allocated():
    text = SCENARIO.replace("count: 2", "count: 1000000000")
    msgs = [(k, m) for _, _, k, m in problems_of(text)]
    assert any(k == "bodies[0].count" and "MAX_BODIES" in m for k, m in msgs), msgs
    # the count/starts mismatch is reported as well, from the counts alone
    assert any(k == "starts" and "expected 1000000000 positions" in m for k, m in msgs), msgs
    # random starts with a huge count: the same refusal, no draw attempted
    rnd = text.replace("starts: [[0.3 mm, 0.3 mm], [0.7 mm, 0.3 mm]]", "starts: {random: {seed: 1}}")
    assert any(k == "bodies[0].count" for _, _, k, _ in problems_of(rnd))


def test_body_count_limit_sums_the_kinds(monkeypatch):
    monkeypatch.setattr(scenario_mod, "MAX_BODIES", 3)
    two_kinds = SCENARIO.replace(
        "bodies: [{kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3}]",
        "bodies: [{kind: a, count: 2, radius: 5 um, density: 1050 kg/m^3}, "
        "{kind: b, count: 2, radius: 5 um, density: 1050 kg/m^3}]")
    (_, _, key, msg), *rest = problems_of(two_kinds)
    assert key == "bodies" and "add up to 4" in msg
    load_scenario(SCENARIO, name="ok")                        # neighbour: 2 <= 3


def test_output_and_inspect_sizes_are_bounded(tmp_path, capsys):
    _, _, key, msg = problems_of(SCENARIO.replace("outputs: {plots: false}", "outputs: {dpi: 100000}"))[0]
    assert key == "outputs.dpi" and "1200" in msg
    _, _, key, msg = problems_of(SCENARIO.replace("trials: 0", "trials: 1000000000"))[0]
    assert key == "simulation.trials" and "MAX_TRIALS" in msg
    assert main(["compare", "x.yaml", "--seeds", "1000000000000", "-q"]) == 2          # no list of 1e12 seeds
    assert "--seeds" in capsys.readouterr().err
    p = tmp_path / "s.yaml"
    p.write_text(SCENARIO)
    for extra in (["--grid", "100000"], ["--trials", "1000000000"]):
        with pytest.raises(SystemExit) as stop:                   # argparse's usage error, exit 2
            main(["inspect", str(p), "--out", str(tmp_path / "i"), "-q"] + extra)
        assert stop.value.code == 2 and "expected a whole number from" in capsys.readouterr().err
    assert main(["inspect", str(p), "--out", str(tmp_path / "i"), "-q", "--counts", "1,100000000"]) == 2
    assert "--counts" in capsys.readouterr().err
    assert not (tmp_path / "i").exists()


# ---------------------------------------------------------------------------------------------
# 5. Many obstacles: vectorised geometry, the same free space as one plain union
# ---------------------------------------------------------------------------------------------

def obstacle_scenario(obstacles):
    lines = "\n".join(f"    - {o}" for o in obstacles)
    return SCENARIO.replace("workspace: {boundary: {rectangle: [0, 0, 1 mm, 1 mm]}}",
                            "workspace:\n  boundary: {rectangle: [0, 0, 1 mm, 1 mm]}\n  obstacles:\n" + lines)


def test_many_obstacles_give_the_free_space_of_a_plain_union():
    rng = np.random.default_rng(4)
    obs = []
    for _ in range(300):   # some overlap, some touch the wall, none near the starts and goals
        x, y = rng.uniform(0.05, 0.95, 2)
        if min(abs(y - 0.3), abs(y - 0.7)) < 0.06:
            continue
        if rng.random() < 0.5:
            obs.append(f"{{circle: {{center: ['{x:.4f} mm', '{y:.4f} mm'], radius: '{rng.uniform(5, 25):.1f} um'}}}}")
        else:
            w = rng.uniform(0.01, 0.06)
            obs.append(f"{{rectangle: ['{x:.4f} mm', '{y:.4f} mm', '{x + w:.4f} mm', '{y + 0.02:.4f} mm']}}")
    obs.append("{rectangle: [0.9 mm, 0.45 mm, 1.1 mm, 0.5 mm]}")            # crosses the boundary
    obs.append("{polygon: [[0.1 mm, 0.45 mm], [0.2 mm, 0.45 mm], [0.15 mm, 0.55 mm]]}")
    ws = load_scenario(obstacle_scenario(obs), name="many").workspace
    # reference: the straightforward construction (one union, one buffer of it, one difference)
    union = shapely.union_all(ws.obstacles)
    for r in (0.0, 5e-6):
        ref = (ws.boundary.buffer(-r) if r else ws.boundary).difference(union.buffer(r) if r else union)
        got = ws.free_space(r)
        assert got.is_valid
        # buffering obstacles one by one and buffering their union differ only by the polygon
        # approximation of the arcs: compare areas to 1e-4 and the symmetric difference
        assert got.area == pytest.approx(ref.area, rel=1e-4)
        assert got.symmetric_difference(ref).area < 1e-4 * ref.area
    xy = rng.uniform(0, 1e-3, (2000, 2))
    inside = shapely.contains_xy(ws.boundary.difference(union), xy[:, 0], xy[:, 1])
    np.testing.assert_array_equal(ws.contains(xy, 0.0), inside)
    assert ws.walls().length == pytest.approx(ws.boundary.difference(union).boundary.length
                                              , rel=0.05)


def test_obstacle_count_and_vertex_limits(monkeypatch):
    obs = [f"{{rectangle: [{0.1 + 0.05 * i} mm, 0.45 mm, {0.12 + 0.05 * i} mm, 0.5 mm]}}" for i in range(10)]
    monkeypatch.setattr(scenario_mod, "MAX_OBSTACLES", 9)
    _, _, key, msg = problems_of(obstacle_scenario(obs))[0]
    assert key == "workspace.obstacles" and "MAX_OBSTACLES" in msg
    monkeypatch.setattr(scenario_mod, "MAX_OBSTACLES", 10)
    load_scenario(obstacle_scenario(obs), name="ok")
    monkeypatch.setattr(scenario_mod, "MAX_OBSTACLE_VERTICES", 200)
    circles = [f"{{circle: {{center: [{0.1 + 0.1 * i} mm, 0.5 mm], radius: 10 um}}}}" for i in range(2)]
    _, _, key, msg = problems_of(obstacle_scenario(circles))[0]
    assert key == "workspace.obstacles" and "MAX_OBSTACLE_VERTICES" in msg


def test_obstacle_errors_still_name_their_index_and_warnings_are_capped():
    obs = ["{rectangle: [0.1 mm, 0.45 mm, 0.12 mm, 0.5 mm]}"] * 3 + ["{circle: {center: [0.5 mm, 0.5 mm]}}"]
    _, _, key, _ = problems_of(obstacle_scenario(obs))[0]
    assert key == "workspace.obstacles[3].circle"
    outside = [f"{{rectangle: [{2 + i} mm, 2 mm, {2.5 + i} mm, 2.5 mm]}}" for i in range(25)]
    sc = load_scenario(obstacle_scenario(outside), name="out")
    ws = [w for w in sc.warnings if "outside the boundary" in w]
    assert len(ws) == 11 and "15 more obstacles" in ws[-1]


def test_long_obstacle_lists_show_progress(monkeypatch, capsys):
    monkeypatch.setattr(scenario_mod, "PROGRESS_OBSTACLES", 5)
    monkeypatch.setattr(scenario_mod, "PROGRESS_VALUES", 50)
    obs = [f"{{rectangle: [{0.1 + 0.05 * i} mm, 0.45 mm, {0.12 + 0.05 * i} mm, 0.5 mm]}}" for i in range(10)]
    load_scenario(obstacle_scenario(obs), name="p", progress=True)
    err = capsys.readouterr().err
    assert "reading obstacles" in err and "reading p" in err
    load_scenario(obstacle_scenario(obs), name="p")
    assert "reading obstacles" not in capsys.readouterr().err


# ---------------------------------------------------------------------------------------------
# 6. fit on a malformed CSV
# ---------------------------------------------------------------------------------------------

HEADER = "track,time [s],x [um],y [um],primitive\n"


def tracks_file(tmp_path, body, name="t.csv", header=HEADER):
    p = tmp_path / name
    p.write_bytes(header.encode() + body if isinstance(body, bytes) else (header + body).encode())
    return p


def good_rows(n=12):
    return "".join(f"a,{0.1 * i:.1f},{2.0 * i},0,push\n" for i in range(n))


@pytest.mark.parametrize("bad_line, what", [
    ('a,0.5,"10,0,push\n', "quoted cell must close"),             # unterminated quote
    ('a,0.5,1"0,0,push\n', "not a number"),                       # stray quote inside a cell
    ("a,0.5,10,0\n", "cells"),                                     # too few cells
    ("a,0.5,ten,0,push\n", "not a number"),
    ("a,0.5,inf,0,push\n", "not finite"),
    (",0.5,10,0,push\n", "empty track"),
])
def test_bad_rows_name_file_and_line_or_are_skipped(tmp_path, bad_line, what):
    rows = good_rows().splitlines(keepends=True)
    body = "".join(rows[:5]) + bad_line + "".join(rows[6:])
    p = tracks_file(tmp_path, body)
    with pytest.raises(TrackingDataError, match=what) as err:
        read_tracks(p, warn=False)
    assert f"{p}:7" in str(err.value)                               # header is line 1, bad row line 7
    data = read_tracks(p, warn=False, skip_bad_rows=True)
    skipped = [i for i in data.issues if i.kind == "skipped"]
    assert [i.line for i in skipped] == [7] and len(data) + 1 == 12 - (data.summary()["issues"].get("missing", 0))


def test_binary_and_undecodable_files(tmp_path):
    with pytest.raises(TrackingDataError, match="binary"):
        read_tracks(tracks_file(tmp_path, bytes(range(256)) * 8, header=""), warn=False)
    latin = tracks_file(tmp_path, good_rows(4).encode() + "a,0.5,10,0,pouss\xe9\n".encode("latin-1"), name="l.csv")
    with pytest.raises(TrackingDataError, match=r"l\.csv:6.*not UTF-8"):
        read_tracks(latin, warn=False)
    with pytest.raises(TrackingDataError, match="every data row is unreadable"):
        read_tracks(tracks_file(tmp_path, "a,\"x\nb,\"y\n", name="all.csv"), warn=False, skip_bad_rows=True)
    # a binary file stays an error with --skip-bad-rows: the header cannot be read
    with pytest.raises(TrackingDataError):
        read_tracks(tracks_file(tmp_path, bytes(range(256)) * 8, header="", name="b2.csv"), skip_bad_rows=True)


def test_fit_command_malformed_csv_exit_2_and_skip_bad_rows(tmp_path, capsys):
    src = (ROOT / "scenarios" / "calibration" / "tracks.csv").read_text().splitlines(keepends=True)
    first = next(i for i, ln in enumerate(src) if ln.strip() and not ln.startswith("#")) + 1
    src[first + 3] = src[first + 3].replace(",", ',"', 1)
    bad = tmp_path / "bad.csv"
    bad.write_text("".join(src))
    assert main(["fit", str(bad), "--out", str(tmp_path / "o"), "--no-plots", "-q"]) == 2
    err = capsys.readouterr().err
    assert f"{bad}:{first + 4}" in err and "Traceback" not in err and not (tmp_path / "o").exists()
    assert main(["fit", str(bad), "--out", str(tmp_path / "o"), "--no-plots", "-q", "--skip-bad-rows"]) == 0
    assert f"line {first + 4}" in capsys.readouterr().err
    report = json.loads((tmp_path / "o" / "actuator-report.json").read_text())
    assert report["skipped_rows"][0].startswith(f"line {first + 4}:")
    assert report["actuator"] == str(tmp_path / "o" / "actuator.json")     # final paths, not the temporary ones


@pytest.mark.skipif(not os.path.exists("/dev/zero"), reason="needs /dev/zero")
def test_devices_are_not_read_as_input(tmp_path, capsys):
    """An endless input (a device or a pipe) is refused, never read until memory runs out."""
    assert main(["fit", "/dev/zero", "--out", str(tmp_path / "o"), "-q"]) == 2
    assert main(["validate", "/dev/zero", "-q"]) == 2
    (tmp_path / "s.yaml").write_text(SCENARIO)
    assert main(["run", str(tmp_path / "s.yaml"), "--schedule", "/dev/zero", "--out", str(tmp_path / "o"), "-q"]) == 2
    assert capsys.readouterr().err.count("not a regular file") == 3
    with pytest.raises(TrackingDataError, match="not a regular file"):
        read_tracks("/dev/zero")


def test_internal_error_text_of_fit_does_not_mention_a_scenario(tmp_path, monkeypatch, capsys):
    import fieldplan.calibration.calibrate as calibrate

    def bug(*a, **k):
        raise RuntimeError("simulated bug")

    monkeypatch.setattr(calibrate, "calibrate_command", bug)
    p = tracks_file(tmp_path, good_rows())
    assert main(["fit", str(p), "--out", str(tmp_path / "o")]) == 3
    err = capsys.readouterr().err
    assert "tracking file" in err and "scenario file" not in err


# ---------------------------------------------------------------------------------------------
# 7. Checking a file never runs code from it; run imports only when asked, and says which file
# ---------------------------------------------------------------------------------------------

MODULE = textwrap.dedent("""\
    import os, pathlib
    import numpy as np
    import fieldplan
    pathlib.Path(os.environ["FIELDPLAN_TEST_SENTINEL"]).write_text("module code ran")

    class Conveyor(fieldplan.Actuator):
        tags = frozenset({"affine_in_input"})
        channels = (fieldplan.Channel("pump", "1", -1, 1),)

        def _velocity(self, body, medium, xy, u):
            return np.tile([u[0] * 1e-5, 0.0], (len(xy), 1))
    """)


@pytest.fixture
def user_module(tmp_path, monkeypatch, request):
    name = f"hostile_mod_{request.node.name.split('[')[0][-20:]}_{os.getpid()}"
    (tmp_path / f"{name}.py").write_text(MODULE)
    sentinel = tmp_path / "sentinel.txt"
    monkeypatch.setenv("FIELDPLAN_TEST_SENTINEL", str(sentinel))
    monkeypatch.setenv("FIELDPLAN_CONFIG", str(tmp_path / "no-config.yaml"))
    monkeypatch.chdir(tmp_path)
    scen = tmp_path / "s.yaml"
    scen.write_text(SCENARIO.replace("{type: source-array, sources: [[0, 0], [1 mm, 0], [1 mm, 1 mm]], force: 3 pN}",
                                     f"{{type: '{name}:Conveyor'}}")
                    + "limits: {channels: {pump: {slew_rate: 10}}}\n")
    yield name, scen, sentinel
    sys.modules.pop(name, None)


def test_validate_never_imports_a_user_module(user_module, capsys):
    name, scen, sentinel = user_module
    assert main(["validate", str(scen)]) == 0
    out = capsys.readouterr()
    assert "not checked" in out.out and "not imported" in out.err
    assert main(["validate", str(scen), "--normalised"]) == 0
    assert f"{name}:Conveyor" in capsys.readouterr().out
    assert not sentinel.exists() and name not in sys.modules
    # neighbours: the rest of the file is still checked, and registered plug-ins are checked fully
    bad = scen.read_text().replace("radius: 5 um", "radius: 5 A")
    scen.write_text(bad)
    assert main(["validate", str(scen), "-q"]) == 2
    assert not sentinel.exists()


def test_run_imports_a_user_module_only_when_asked(user_module, tmp_path, capsys):
    name, scen, sentinel = user_module
    (tmp_path / "afile").write_text("x")
    blocked = tmp_path / "afile" / "out"        # a refused --out: the run stops right after loading
    assert main(["run", str(scen), "--out", str(blocked), "-q"]) == 2
    err = capsys.readouterr().err
    assert f"--allow-module {name}" in err and not sentinel.exists()
    assert main(["run", str(scen), "--out", str(blocked), "-q", "--allow-module", name]) == 2
    err = capsys.readouterr().err
    assert f"importing actuator module {name!r} from {tmp_path / (name + '.py')}" in err
    assert sentinel.exists()


def test_user_configuration_may_allow_a_module(user_module, tmp_path, monkeypatch):
    name, scen, sentinel = user_module
    cfg = tmp_path / "config.yaml"
    cfg.write_text(f"allow_modules: [{name}]\n")
    monkeypatch.setenv("FIELDPLAN_CONFIG", str(cfg))
    seen = []
    sc = load_scenario(str(scen), on_import=lambda *a: seen.append(a))
    assert type(sc.actuator).__name__ == "Conveyor" and sentinel.exists()
    assert seen and seen[0][0] == name and str(cfg) in seen[0][2]
    cfg.write_text("allow_modules: 3\n")
    sys.modules.pop(name, None)
    with pytest.raises(ScenarioError, match="allow_modules"):
        load_scenario(str(scen))


# ---------------------------------------------------------------------------------------------
# 14. Output files follow the user's umask
# ---------------------------------------------------------------------------------------------

@pytest.mark.skipif(os.name != "posix", reason="POSIX permissions")
@pytest.mark.parametrize("umask", [0o022, 0o027, 0o077])
def test_outputs_follow_the_umask(tmp_path, umask):
    old = os.umask(umask)
    try:
        with output_folder(tmp_path / "out") as tmp:
            atomic_write(os.path.join(tmp, "schedule.csv"), "x")
            with open(os.path.join(tmp, "plain.png"), "w") as fh:      # what matplotlib does
                fh.write("x")
    finally:
        os.umask(old)
    out = tmp_path / "out"
    assert out.stat().st_mode & 0o777 == 0o777 & ~umask
    for f in ("schedule.csv", "plain.png", MARKER):
        assert (out / f).stat().st_mode & 0o777 == 0o666 & ~umask, f


def test_limits_are_documented_in_the_readme():
    readme = (ROOT / "README.md").read_text()
    for name in ("MAX_FILE_CHARS", "MAX_DEPTH", "MAX_NODES", "MAX_ALIAS_NODES", "MAX_BODIES", "MAX_OBSTACLES",
                 "MAX_OBSTACLE_VERTICES", "MAX_TRIALS"):
        value = getattr(scenario_mod, name)
        assert f"{value:,}" in readme, (name, value)
    for flag in ("--allow-module", "--skip-bad-rows", MARKER):
        assert flag in readme
