"""Every scenario file shipped in scenarios/ validates and runs (trials reduced to one; FIELDPLAN_FULL=1
runs the files' own trial counts)."""

import json
import os
import pathlib

import pytest

from fieldplan.cli import main
from fieldplan.scenario import load_scenario

ROOT = pathlib.Path(__file__).resolve().parents[2]
FILES = sorted(p.relative_to(ROOT).as_posix() for p in (ROOT / "scenarios").rglob("*.yaml"))
FULL = os.environ.get("FIELDPLAN_FULL") == "1"


def test_there_is_a_demo_and_one_scenario_per_builtin_actuator():
    from fieldplan.contract.registry import available_actuators

    types = {}
    for f in FILES:
        sc = load_scenario(str(ROOT / f))
        for s in [sc] + sc.variants:
            types.setdefault(type(s.actuator).__module__ + ":" + type(s.actuator).__name__, set()).add(f)
    assert "scenarios/demo.yaml" in FILES
    builtin = {v for k, v in available_actuators().items() if v.startswith("fieldplan.actuators.")}
    missing = sorted(b for b in builtin if b not in types)
    assert not missing, f"no scenario uses {missing}"
    multi = [f for f in FILES if len({type(v.actuator) for v in load_scenario(str(ROOT / f)).variants}) >= 3]
    assert multi, "no comparison scenario across three actuators"


@pytest.mark.parametrize("path", FILES)
def test_scenario_validates(path, monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    assert main(["validate", path]) == 0, capsys.readouterr().err


@pytest.mark.parametrize("path", FILES)
def test_scenario_runs(path, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(ROOT)
    sc = load_scenario(path)
    out = tmp_path / "out"
    if sc.variants:
        cmp_out = tmp_path / "cmp"
        args = ["compare", path, "--seeds", "1", "--trials", "1" if not FULL else str(sc.simulation.trials),
                "--workers", "1", "--out", str(cmp_out), "--quiet"]
        code = main(args)
        err = capsys.readouterr().err
        assert code in (0, 1), err
        rows = json.loads((cmp_out / "comparison.json").read_text())["rows"]
        assert [r["label"] for r in rows] == [v.name for v in sc.variants]
        assert all(r["errors"] == 0 for r in rows), [r["error_messages"] for r in rows]
    args = ["run", path, "--out", str(out), "--quiet"]
    if not FULL:
        args += ["--trials", "1"]
    if path != "scenarios/demo.yaml":
        args += ["--no-plots"]
    code = main(args)
    err = capsys.readouterr().err
    assert code in (0, 1), err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["exit_code"] == code
    assert sorted(os.listdir(out)) == sorted(summary["files"])
    if path == "scenarios/demo.yaml":
        # the demo is the front door: it must reach its goals, and draw its plots
        assert code == 0, summary["message"]
        assert {"workspace.png", "timeline.png", "inputs.png"} <= set(summary["files"])
