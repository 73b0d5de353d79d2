"""The ``fieldplan`` command: bad input gives exit 2 with file, line and key; the real command end to end."""

import json
import os
import pathlib
import re
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from fieldplan import Schedule
from fieldplan.cli import build_parser, main
from fieldplan.workflows.export import read_trajectories

ROOT = pathlib.Path(__file__).resolve().parents[1]

GOOD = textwrap.dedent("""\
    name: cli-test
    workspace:
      boundary: {rectangle: [0, 0, 1 mm, 1 mm]}
      obstacles:
        - rectangle: [0.45 mm, 0.3 mm, 0.55 mm, 0.7 mm]
    bodies:
      - kind: bead
        count: 2
        radius: 5 um
        density: 1050 kg/m^3
    starts: [[0.2 mm, 0.3 mm], [0.2 mm, 0.7 mm]]
    goals: [[0.8 mm, 0.3 mm], [0.8 mm, 0.7 mm]]
    actuator:
      type: source-array
      sources: [[0, 0], [1 mm, 0], [1 mm, 1 mm], [0, 1 mm]]
      force: 3 pN
    limits:
      time_step: 10 ms
      channels:
        source_1: {slew_rate: 50}
    planner:
      tolerance: 20 um
    simulation:
      trials: 1
    outputs:
      plots: false
    """)

# (name, old text, new text, text on the offending line, key path expected in the message)
BAD = [
    ("typo-top-level-key", "simulation:", "simulaton:", "simulaton:", "simulaton"),
    ("typo-nested-key", "    radius: 5 um", "    raduis: 5 um", "raduis", "bodies[0].raduis"),
    ("wrong-unit", "    radius: 5 um", "    radius: 5 A", "radius: 5 A", "bodies[0].radius"),
    ("not-a-number", "    density: 1050 kg/m^3", "    density: heavy", "density: heavy", "bodies[0].density"),
    ("negative-count", "    count: 2", "    count: -2", "count: -2", "bodies[0].count"),
    ("missing-actuator", "actuator:\n  type: source-array\n  sources: [[0, 0], [1 mm, 0], [1 mm, 1 mm], [0, 1 mm]]\n"
                         "  force: 3 pN\n", "", "name: cli-test", "(top level)"),
    ("unknown-actuator", "type: source-array", "type: sorce-array", "sorce-array", "actuator.type"),
    ("unknown-actuator-parameter", "  force: 3 pN", "  forse: 3 pN", "forse", "actuator.forse"),
    ("malformed-yaml", "starts: [[0.2 mm, 0.3 mm], [0.2 mm, 0.7 mm]]", "starts: [[0.2 mm, 0.3 mm], [0.2 mm, 0.7 mm]",
     None, "starts"),
    ("bad-indentation", "    count: 2\n", "    count: 2\n   radius: 5 um\n", None, None),
    ("goal-in-obstacle", "goals: [[0.8 mm, 0.3 mm], [0.8 mm, 0.7 mm]]", "goals: [[0.5 mm, 0.5 mm], [0.8 mm, 0.7 mm]]",
     "goals:", "goals[0]"),
    ("start-outside-boundary", "starts: [[0.2 mm, 0.3 mm]", "starts: [[1.2 mm, 0.3 mm]", "starts:", "starts[0]"),
    ("overlapping-starts", "starts: [[0.2 mm, 0.3 mm], [0.2 mm, 0.7 mm]]",
     "starts: [[0.2 mm, 0.3 mm], [0.2 mm, 0.305 mm]]", "starts:", "starts[1]"),
    ("too-few-goals", "goals: [[0.8 mm, 0.3 mm], [0.8 mm, 0.7 mm]]", "goals: [[0.8 mm, 0.3 mm]]", "goals:", "goals"),
    ("unknown-limit-channel", "    source_1: {slew_rate: 50}", "    source_9: {slew_rate: 50}", "source_9",
     "limits.channels.source_9"),
    ("limit-wrong-unit", "    source_1: {slew_rate: 50}", "    source_1: {slew_rate: 50 A}", "slew_rate: 50 A",
     "limits.channels.source_1.slew_rate"),
    ("planner-typo", "  tolerance: 20 um", "  tolerence: 20 um", "tolerence", "planner.tolerence"),
    ("duplicate-key", "  trials: 1", "  trials: 1\n  trials: 2", "trials: 2", "simulation.trials"),
    ("negative-trials", "  trials: 1", "  trials: -1", "trials: -1", "simulation.trials"),
    ("zero-time-step", "  time_step: 10 ms", "  time_step: 0 s", "time_step: 0 s", "limits.time_step"),
    ("inverted-rectangle", "boundary: {rectangle: [0, 0, 1 mm, 1 mm]}", "boundary: {rectangle: [1 mm, 0, 0, 1 mm]}",
     "boundary:", "workspace.boundary.rectangle"),
    ("medium-preset-typo", "workspace:\n", "medium: {preset: watr}\nworkspace:\n", "watr", "medium.preset"),
    ("python-tag", "name: cli-test", "name: !!python/object/apply:os.getcwd []", "name:", "name"),
    ("polygon-two-points", "    - rectangle: [0.45 mm, 0.3 mm, 0.55 mm, 0.7 mm]", "    - polygon: [[0, 0], [1, 1]]",
     "polygon", "workspace.obstacles[0].polygon"),
    ("unknown-plot", "  plots: false", "  plots: [workspace, heatmap]", "plots:", "outputs.plots[1]"),
]


def write(tmp_path, text, name="scenario.yaml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def _env(**extra):
    return dict(os.environ, MPLBACKEND="Agg", PYTHONPATH=os.pathsep.join(
        [str(ROOT)] + ([os.environ["PYTHONPATH"]] if os.environ.get("PYTHONPATH") else [])), **extra)


@pytest.fixture(scope="module")
def base_run(tmp_path_factory):
    """One real run through the console script in a subprocess (shared by the end-to-end checks)."""
    d = tmp_path_factory.mktemp("e2e")
    scen = write(d, GOOD.replace("  plots: false", "  plots: [inputs]\n  resample_rate: 50 Hz"))
    out = d / "out"
    # `python -m` with this checkout first on the path, so the code under test is the one beside the tests
    cmd = [sys.executable, "-m", "fieldplan.cli"]
    proc = subprocess.run(cmd + ["run", str(scen), "--out", str(out)], capture_output=True, text=True,
                          env=_env(), timeout=300)
    return proc, out, scen, cmd


def test_good_file_is_good(tmp_path, capsys):
    assert main(["validate", str(write(tmp_path, GOOD))]) == 0
    assert "ok" in capsys.readouterr().out


def test_at_least_fifteen_distinct_mistakes():
    assert len({b[0] for b in BAD}) >= 15


@pytest.mark.parametrize("name,old,new,needle,key", BAD, ids=[b[0] for b in BAD])
def test_bad_file_exit_2_names_file_line_key(tmp_path, capsys, name, old, new, needle, key):
    assert old in GOOD, name
    text = GOOD.replace(old, new, 1)
    path = write(tmp_path, text, f"{name}.yaml")
    out = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "Traceback" not in err
    assert not out.exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]
    assert f"{path}:" in err                       # file and line
    line = int(err.split(f"{path}:")[1].split(",")[0].split(":")[0])
    if needle is not None:
        want = next(i for i, ln in enumerate(text.splitlines(), 1) if needle in ln)
        assert line == want, err
    if key is not None:
        assert f"key '{key}'" in err, err


def test_bad_file_through_the_real_command(tmp_path, base_run):
    """Exit 2, no traceback, no output folder, from a subprocess (what a user sees)."""
    _, _, _, cmd = base_run
    path = write(tmp_path, GOOD.replace("    radius: 5 um", "    radius: 5 A"))
    proc = subprocess.run(cmd + ["run", str(path), "--out", str(tmp_path / "o")], capture_output=True, text=True,
                          timeout=120, env=_env())
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert f"{path}:{GOOD.splitlines().index('    radius: 5 um') + 1}" in proc.stderr
    assert "bodies[0].radius" in proc.stderr
    assert not (tmp_path / "o").exists()


def test_end_to_end_outputs_exist_parse_and_agree(base_run):
    proc, out, scen, _ = base_run
    assert proc.returncode in (0, 1), proc.stderr
    assert "Traceback" not in proc.stderr
    assert str(out) in proc.stdout                  # says where the outputs are
    summary = json.loads((out / "summary.json").read_text())
    assert sorted(os.listdir(out)) == sorted(summary["files"])
    assert ".fieldplan-output" in summary["files"]            # the marker: fieldplan wrote this folder
    for f in ("schedule.csv", "schedule.json", "schedule_resampled.csv", "trajectories.csv", "inputs.png"):
        assert (out / f).stat().st_size > 0
    assert proc.returncode == summary["exit_code"]
    # CSV and JSON hold the same schedule, and it is the one the summary describes
    meta = json.loads((out / "schedule.json").read_text())
    from fieldplan.scenario import load_scenario
    sc = load_scenario(str(scen))
    csv_s = Schedule.read_csv(out / "schedule.csv", sc.actuator.channels)
    json_s = Schedule.read_json(out / "schedule.json")
    assert csv_s == json_s
    assert csv_s.n_segments == summary["schedule"]["n_segments"]
    assert csv_s.duration == pytest.approx(summary["schedule"]["duration"], rel=1e-12)
    assert meta["scenario_hash"] == summary["scenario"]["hash"] == sc.digest
    assert meta["package_version"] == summary["package_version"]
    assert [c["unit"] for c in meta["channels"]] == ["1"] * 4
    head = (out / "schedule.csv").read_text().splitlines()[0]
    assert head == "start [s],duration [s],source_1 [1],source_2 [1],source_3 [1],source_4 [1],label"
    csv_s.check(sc.limits)
    # the trajectories agree with the per-trial metrics
    trajs = read_trajectories(out / "trajectories.csv")
    t, pos = trajs["trial 1"]
    goals = np.array(summary["goals"])
    err = np.linalg.norm(pos[-1] - goals, axis=1)
    np.testing.assert_allclose(err, summary["trials"][0]["metrics"]["final_error"], rtol=1e-12)
    assert summary["trials"][0]["success"] == bool(np.all(err <= summary["tolerance"]))
    assert "predicted" in trajs
    # the resampled file holds the value in force at each sample time
    rs = np.loadtxt(out / "schedule_resampled.csv", delimiter=",", skiprows=1)
    np.testing.assert_allclose(rs[:, 0], np.arange(len(rs)) / 50.0, atol=1e-12)
    for row in rs[:: max(len(rs) // 7, 1)]:
        np.testing.assert_array_equal(row[1:], csv_s.value_at(row[0]))


def test_existing_folder_is_refused_without_force(base_run, capsys):
    _, out, scen, _ = base_run
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    assert main(["run", str(scen), "--out", str(out), "--quiet"]) == 2
    assert "--force" in capsys.readouterr().err
    assert {p.name: p.stat().st_mtime_ns for p in out.iterdir()} == before


def test_replay_a_schedule_and_force(base_run, tmp_path, capsys):
    """--schedule plays a saved schedule on the truth model; --force replaces a folder fieldplan wrote whole."""
    from fieldplan.workflows.export import MARKER

    _, out, scen, _ = base_run
    target = tmp_path / "replay"
    target.mkdir()
    (target / "stale.txt").write_text("old")
    args = ["run", str(scen), "--schedule", str(out / "schedule.csv"), "--out", str(target), "--force",
            "--trials", "1", "--no-plots"]
    assert main(args) == 2                              # no marker: not fieldplan's folder, never replaced
    assert "not written by fieldplan" in capsys.readouterr().err
    assert sorted(os.listdir(target)) == ["stale.txt"]
    (target / MARKER).write_text("{}")
    code = main(["run", str(scen), "--schedule", str(out / "schedule.csv"), "--out", str(target), "--force",
                 "--trials", "1", "--no-plots"])
    assert code in (0, 1)
    assert not (target / "stale.txt").exists()
    s = json.loads((target / "summary.json").read_text())
    assert s["plan"]["source"] == "replay"
    assert Schedule.read_json(target / "schedule.json") == Schedule.read_json(out / "schedule.json")


def test_unreachable_goal_exits_1(tmp_path, capsys):
    """Planned, but a far too short time limit: exit 1 and the outputs are still written."""
    text = GOOD.replace("  tolerance: 20 um", "  tolerance: 20 um\n  time_limit: 1 s").replace("  trials: 1", "  trials: 0")
    out = tmp_path / "o"
    assert main(["run", str(write(tmp_path, text)), "--out", str(out), "--quiet"]) == 1
    s = json.loads((out / "summary.json").read_text())
    assert s["exit_code"] == 1 and s["plan"]["success"] is False and "time limit" in s["plan"]["message"]


@pytest.mark.parametrize("command", ["run", "compare", "inspect", "validate", "fit", "schema"])
def test_help_on_every_subcommand_has_an_example(command, capsys):
    with pytest.raises(SystemExit) as ex:
        main([command, "--help"])
    assert ex.value.code == 0
    text = capsys.readouterr().out
    assert "example:" in text and f"fieldplan {command}" in text


def test_parser_names_subcommands():
    p = build_parser()
    assert {"run", "compare", "inspect", "validate", "fit", "schema"} <= set(p._subparsers._group_actions[0].choices)


def test_validate_normalised_round_trips(tmp_path, capsys):
    path = write(tmp_path, GOOD)
    assert main(["validate", str(path), "--normalised"]) == 0
    text = capsys.readouterr().out
    again = write(tmp_path, text, "again.yaml")
    assert main(["validate", str(again)]) == 0


def test_compare_in_process_writes_table_and_chart(tmp_path, capsys):
    text = GOOD + textwrap.dedent("""\
        variants:
          - name: weak
            actuator: {force: 2 pN}
          - name: strong
            actuator: {force: 4 pN}
        """)
    out = tmp_path / "cmp"
    code = main(["compare", str(write(tmp_path, text)), "--seeds", "2", "--workers", "1", "--out", str(out)])
    assert code in (0, 1)
    md = (out / "comparison.md").read_text()
    assert "cli-test/weak" in md and "cli-test/strong" in md and "success rate" in md
    rows = (out / "comparison.csv").read_text().splitlines()
    assert len(rows) == 3 and rows[0].startswith("variant,actuator,runs")
    data = json.loads((out / "comparison.json").read_text())
    assert [len(data["runs"][k]) for k in ("cli-test/weak", "cli-test/strong")] == [2, 2]
    assert (out / "comparison.png").stat().st_size > 0
    # stronger sources move beads faster: time to goal must not grow
    r = {row["label"]: row for row in data["rows"]}
    if r["cli-test/weak"]["time_to_goal"] and r["cli-test/strong"]["time_to_goal"]:
        assert r["cli-test/strong"]["time_to_goal"] < r["cli-test/weak"]["time_to_goal"]


def test_schema_lists_actuators(capsys):
    assert main(["schema", "--actuators-only"]) == 0
    out = capsys.readouterr().out
    assert "source-array" in out and "sources [m]" in out and "force [N]" in out


def test_schema_lists_every_planner_setting_with_its_unit(capsys):
    import dataclasses

    from fieldplan.planning.settings import PlanSettings

    assert main(["schema"]) == 0
    out = capsys.readouterr().out
    planner = out.split("### `planner`", 1)[1].split("\n### ", 1)[0]
    cells = [re.split(r"(?<!\\)\|", ln) for ln in planner.splitlines() if ln.startswith("| `")]   # not at "\|"
    rows = {c[1].strip(" `"): c[3].strip() for c in cells}
    for f in dataclasses.fields(PlanSettings):
        if f.name != "assign_goals":            # a scenario sets it as goals.unlabelled
            assert rows[f.name] == f.metadata.get("unit", ""), f.name
    assert set(rows) == {f.name for f in dataclasses.fields(PlanSettings)} - {"assign_goals"} | {"mode"}
    assert rows["period"] == "s" and rows["tolerance"] == "m" and rows["iterations"] == ""


def test_inspect_writes_fields_and_steerability(tmp_path, capsys):
    out = tmp_path / "insp"
    code = main(["inspect", str(write(tmp_path, GOOD)), "--out", str(out), "--trials", "4", "--grid", "12",
                 "--counts", "1,2,3"])
    assert code == 0
    names = set(os.listdir(out))
    assert {"fields-bead.png", "inspect.md", "inspect.json"} <= names
    rep = json.loads((out / "inspect.json").read_text())
    assert rep["channels"][0]["name"] == "source_1"
    if "at_start" in rep:
        # four affine sources steer two bodies at most (counting rule K/2 = 2, PHYSICS-NOTES.md)
        assert rep["count_curves"]["bead"]["fraction"][2] == 0.0


def test_compare_on_local_processes_and_on_dask(tmp_path):
    """Sweeps run through concurrent.futures: a local process pool, or a dask.distributed scheduler."""
    from fieldplan.scenario import load_scenario
    from fieldplan.workflows.compare import compare, make_executor

    sc = load_scenario(GOOD, name="x")
    with make_executor(None, 2) as ex:
        local = compare([sc], seeds=[0], trials=1, executor=ex)
    assert local.rows[0]["errors"] == 0, local.rows[0]["error_messages"]
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=1, processes=False, threads_per_worker=1, dashboard_address=None) as cl:
        with make_executor(cl.scheduler_address) as ex:
            remote = compare([sc], seeds=[0], trials=1, executor=ex)
    assert remote.rows[0]["errors"] == 0, remote.rows[0]["error_messages"]
    # same seed, same task: the same numbers wherever it ran
    for key in ("final_error", "input_energy", "min_separation"):
        assert remote.rows[0][key] == pytest.approx(local.rows[0][key], rel=1e-12)


def test_unreachable_scheduler_is_a_clear_error():
    pytest.importorskip("dask.distributed")
    from fieldplan import FieldplanError
    from fieldplan.workflows.compare import make_executor

    with pytest.raises(FieldplanError, match="scheduler at 'tcp://127.0.0.1:9'"):
        with make_executor("tcp://127.0.0.1:9", timeout=1.0):
            pass


def test_fit_writes_a_calibrated_actuator_a_scenario_can_use(tmp_path, capsys):
    """`fieldplan fit` on the invented demo tracks, then a scenario that names the result."""
    tracks = ROOT / "scenarios" / "calibration" / "tracks.csv"
    if not tracks.exists():
        pytest.skip("no demo tracking data")
    out = tmp_path / "fit"
    assert main(["fit", str(tracks), "--out", str(out), "--no-plots", "--quiet"]) == 0
    assert (out / "actuator.json").exists() and (out / "actuator.npz").exists()
    assert main(["fit", str(tracks), "--out", str(out), "--quiet"]) == 2          # exists, no --force
    assert "--force" in capsys.readouterr().err
    text = GOOD.replace("bead\n", "bead-2um\n").replace("5 um", "2 um").replace(
        "actuator:\n  type: source-array\n  sources: [[0, 0], [1 mm, 0], [1 mm, 1 mm], [0, 1 mm]]\n  force: 3 pN\n",
        "actuator: {type: calibrated, path: fit/actuator.json}\n").replace(
        "limits:\n  time_step: 10 ms\n  channels:\n    source_1: {slew_rate: 50}\n", "")
    text = text.replace("[[0.2 mm, 0.3 mm], [0.2 mm, 0.7 mm]]", "[[0.3 mm, 0.3 mm], [0.3 mm, 0.6 mm]]")
    text = text.replace("[[0.8 mm, 0.3 mm], [0.8 mm, 0.7 mm]]", "[[0.7 mm, 0.3 mm], [0.7 mm, 0.6 mm]]")
    path = write(tmp_path, text)       # the relative path resolves against the scenario's folder
    assert main(["validate", str(path)]) == 0, capsys.readouterr().err
    assert "CalibratedActuator" in capsys.readouterr().out
