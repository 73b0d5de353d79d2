"""Output folders: limits refused before writing, atomic folders, and the exported-schedule property."""

import json
import os
import textwrap

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fieldplan import LimitError, Schedule, Segment
from fieldplan.cli import main
from fieldplan.scenario import load_scenario
from fieldplan.workflows.compare import run_scenario
from fieldplan.workflows.export import OutputExistsError, write_outputs


def scenario_text(n_sources=3, limits="", size_mm=1.0, trials=0):
    src = [[0, 0], [size_mm, 0], [size_mm, size_mm], [0, size_mm]][:n_sources]
    src_txt = ", ".join(f"[{x} mm, {y} mm]" for x, y in src)
    s = size_mm
    return textwrap.dedent(f"""\
        name: export-test
        workspace: {{boundary: {{rectangle: [0, 0, {s} mm, {s} mm]}}}}
        bodies: [{{kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3}}]
        starts: [[{0.3 * s} mm, {0.3 * s} mm], [{0.7 * s} mm, {0.3 * s} mm]]
        goals: [[{0.3 * s} mm, {0.7 * s} mm], [{0.7 * s} mm, {0.7 * s} mm]]
        actuator: {{type: source-array, sources: [{src_txt}], force: 3 pN}}
        planner: {{tolerance: 30 um}}
        simulation: {{trials: {trials}}}
        outputs: {{plots: false}}
        """) + limits


def listing(folder):
    return sorted(os.listdir(folder))


def test_limit_violation_is_refused_before_anything_is_written(tmp_path):
    sc = load_scenario(scenario_text(limits="limits:\n  channels:\n    source_2: {upper: 0.5}\n"), name="x")
    sched = Schedule.from_segments(sc.actuator.channels, [Segment(0, 1.0, [0, 0.4, 0]), Segment(0, 2.0, [0, 0.7, 0])])
    run = run_scenario(sc, schedule=Schedule.from_segments(sc.actuator.channels, [Segment(0, 1.0, [0, 0.4, 0])]))
    run.schedule = sched
    with pytest.raises(LimitError) as err:
        write_outputs(tmp_path / "out", run)
    assert err.value.channel == "source_2" and err.value.limit == "upper" and err.value.time == pytest.approx(1.0)
    assert listing(tmp_path) == []


def test_cli_refuses_a_schedule_that_breaks_limits(tmp_path, capsys):
    """Exit 2, naming channel, time and limit (the replayed schedule breaks a slew limit)."""
    path = tmp_path / "s.yaml"
    path.write_text(scenario_text(limits="limits:\n  channels:\n    source_1: {slew_rate: 0.1}\n"))
    csv_path = tmp_path / "sched.csv"
    csv_path.write_text("start [s],duration [s],source_1 [1],source_2 [1],source_3 [1],label\n"
                        "0,2,0,0,0,a\n2,1,0.5,0,0,b\n")
    code = main(["run", str(path), "--schedule", str(csv_path), "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    assert "source_1" in err and "t = 2 s" in err and "slew" in err
    assert not (tmp_path / "out").exists()
    assert not [p for p in os.listdir(tmp_path) if p.startswith(".out")]


def test_cli_refuses_a_schedule_with_other_channels(tmp_path, capsys):
    path = tmp_path / "s.yaml"
    path.write_text(scenario_text())
    csv_path = tmp_path / "sched.csv"
    csv_path.write_text("start [s],duration [s],coil_1 [A],label\n0,2,0,a\n")
    assert main(["run", str(path), "--schedule", str(csv_path), "--out", str(tmp_path / "out"), "-q"]) == 2
    assert "coil_1" in capsys.readouterr().err


def test_failure_while_writing_leaves_no_partial_folder(tmp_path, monkeypatch):
    sc = load_scenario(scenario_text(), name="x")
    run = run_scenario(sc, schedule=Schedule.from_segments(sc.actuator.channels, [Segment(0, 1.0, [0, 0.4, 0])]))
    import fieldplan.workflows.export as export

    def boom(*a, **k):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(export, "write_trajectories", boom)
    with pytest.raises(RuntimeError):
        write_outputs(tmp_path / "out", run)
    assert listing(tmp_path) == []
    # an earlier output folder survives a failed --force rewrite untouched
    monkeypatch.undo()
    write_outputs(tmp_path / "out", run)
    (tmp_path / "out" / "summary.json").write_text("previous run")
    before = listing(tmp_path / "out")
    monkeypatch.setattr(export, "write_trajectories", boom)
    with pytest.raises(RuntimeError):
        write_outputs(tmp_path / "out", run, force=True)
    assert listing(tmp_path) == ["out"] and listing(tmp_path / "out") == before
    assert (tmp_path / "out" / "summary.json").read_text() == "previous run"
    with pytest.raises(OutputExistsError):
        write_outputs(tmp_path / "out", run)
    monkeypatch.undo()
    files = write_outputs(tmp_path / "out", run, force=True)
    assert json.loads(open(files["summary"]).read())["format"] == "fieldplan-summary"


# --------------------------------------------------------------------------------------------
# Property: no exported schedule contains a value, slew or RMS outside its limits.
# Checked by an implementation independent of Schedule.violations (overlap integrals).
# --------------------------------------------------------------------------------------------

def independent_violations(sched, limits, rtol=1e-9):
    out = []
    ts = limits.time_step
    starts, durs, vals = sched.starts, sched.durations, sched.values
    ends = starts + durs
    for k, c in enumerate(sched.channels):
        lim = limits.get(c.name)
        lo = max(c.lower, lim.lower) if lim.lower is not None else c.lower
        hi = min(c.upper, lim.upper) if lim.upper is not None else c.upper
        scale = max(abs(lo), abs(hi), 1e-12)
        v = vals[:, k]
        if np.any(v > hi + rtol * scale) or np.any(v < lo - rtol * scale):
            out.append(("value", c.name))
        if lim.slew_rate is not None and len(v) > 1:
            for j in range(1, len(v)):
                dt = ts if ts else durs[j]
                if abs(v[j] - v[j - 1]) > lim.slew_rate * dt * (1 + 1e-7) + 1e-12 * scale:
                    out.append(("slew", c.name))
                    break
        if lim.rms is not None and len(v) and ends[-1] > starts[0]:
            total = ends[-1] - starts[0]
            w = lim.rms_window if lim.rms_window and lim.rms_window < total else total
            cand = np.unique(np.concatenate([np.linspace(starts[0], ends[-1] - w, 401), starts, ends - w, ends,
                                             starts - w]))
            cand = cand[(cand >= starts[0] - 1e-12) & (cand <= ends[-1] - w + 1e-12)]
            a, b = cand[:, None], cand[:, None] + w
            overlap = np.clip(np.minimum(b, ends[None]) - np.maximum(a, starts[None]), 0, None)
            r = np.sqrt(np.max(overlap @ (v ** 2)) / w)
            if r > lim.rms * (1 + 1e-7):
                out.append(("rms", c.name))
    if ts:
        for arr in (starts, durs):
            q = arr / ts
            if np.any(np.abs(q - np.round(q)) > 1e-6):
                out.append(("time_step", None))
                break
    return out


def limits_yaml(draw, n_channels):
    lines = ["limits:"]
    if draw(st.booleans()):
        lines.append(f"  time_step: {draw(st.sampled_from([0.01, 0.05, 0.1]))}")
    lines.append("  channels:")
    for k in range(n_channels):
        parts = []
        if draw(st.booleans()):
            up = draw(st.floats(0.05, 1.0))
            parts.append(f"upper: {up}")
            if draw(st.booleans()):
                parts.append(f"lower: {-draw(st.floats(0.05, 1.0))}")
        if draw(st.booleans()):
            parts.append(f"slew_rate: {draw(st.floats(0.05, 20.0))}")
        if draw(st.booleans()):
            parts.append(f"rms: {draw(st.floats(0.05, 1.0))}")
            if draw(st.booleans()):
                parts.append(f"rms_window: {draw(st.floats(0.3, 5.0))} s")
        if parts:
            lines.append(f"    source_{k + 1}: {{{', '.join(parts)}}}")
    if lines[-1] == "  channels:":
        lines.pop()
    return "\n".join(lines) + "\n"


@st.composite
def schedule_cases(draw):
    n = draw(st.integers(2, 4))
    limits = limits_yaml(draw, n)
    m = draw(st.integers(1, 8))
    durs = draw(st.lists(st.floats(0.005, 2.0), min_size=m, max_size=m))
    vals = draw(st.lists(st.lists(st.floats(-1.0, 1.0), min_size=n, max_size=n), min_size=m, max_size=m))
    return n, limits, durs, vals


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=schedule_cases())
def test_property_exported_schedules_respect_limits(case, tmp_path_factory):
    """Random small scenarios, random limits, random schedules: the exporter writes only schedules
    within every value, slew and RMS limit; otherwise it refuses and writes nothing."""
    n, limits, durs, vals = case
    sc = load_scenario(scenario_text(n_sources=n, limits=limits), name="prop.yaml")
    sched = Schedule.from_segments(sc.actuator.channels, [Segment(0, d, v) for d, v in zip(durs, vals)])
    folder = tmp_path_factory.mktemp("prop")
    out = folder / "out"
    try:
        run = run_scenario(sc, schedule=sched, trials=0)
        write_outputs(out, run)
    except LimitError:
        assert listing(folder) == []
        return
    written = Schedule.read_csv(out / "schedule.csv", sc.actuator.channels)
    assert independent_violations(written, sc.limits) == []
    assert written == Schedule.read_json(out / "schedule.json") == run.schedule   # exact CSV/JSON round trip
    assert written.labels == run.schedule.labels


def test_property_checker_is_not_vacuous():
    """The independent checker itself catches each kind of violation (else the property proves nothing)."""
    sc = load_scenario(scenario_text(n_sources=2, limits=textwrap.dedent("""\
        limits:
          time_step: 0.1
          channels:
            source_1: {upper: 0.5, slew_rate: 1.0}
            source_2: {rms: 0.3, rms_window: 1 s}
        """)), name="x")
    ch = sc.actuator.channels
    cases = {
        "value": [Segment(0, 1.0, [0.6, 0.0])],
        "slew": [Segment(0, 1.0, [0.0, 0.0]), Segment(0, 1.0, [0.3, 0.0])],
        "rms": [Segment(0, 3.0, [0.0, 0.0]), Segment(0, 0.6, [0.0, 0.5]), Segment(0, 3.0, [0.0, 0.0])],
        "time_step": [Segment(0, 0.15, [0.0, 0.0])],
    }
    for kind, segs in cases.items():
        found = {v[0] for v in independent_violations(Schedule.from_segments(ch, segs), sc.limits)}
        assert kind in found, kind


@st.composite
def planner_cases(draw):
    n = draw(st.sampled_from([3, 4]))
    limits = limits_yaml(draw, n)
    size = draw(st.sampled_from([0.6, 1.0]))
    return n, limits, size


@settings(max_examples=6, deadline=None)
@given(case=planner_cases())
def test_property_planned_and_exported_schedules_respect_limits(case, tmp_path_factory):
    """Through the planner: whatever it plans under random limits, what is exported is within them."""
    n, limits, size = case
    text = scenario_text(n_sources=n, limits=limits, size_mm=size).replace(
        "planner: {tolerance: 30 um}", "planner: {tolerance: 30 um, max_steps: 60}")
    sc = load_scenario(text, name="prop.yaml")
    folder = tmp_path_factory.mktemp("plan-prop")
    try:
        run = run_scenario(sc, trials=0)
        write_outputs(folder / "out", run)
    except LimitError:
        assert listing(folder) == []
        return
    written = Schedule.read_csv(folder / "out" / "schedule.csv", sc.actuator.channels)
    assert independent_violations(written, sc.limits) == []
    summary = json.loads((folder / "out" / "summary.json").read_text())
    assert summary["schedule"]["limits_checked"] == sc.limits.to_dict()


def test_plots_and_animation_are_written(tmp_path):
    """Every plot and the GIF (matplotlib PillowWriter) end up in the folder, and are real images."""
    import dataclasses

    from fieldplan.scenario import OutputSettings

    sc = load_scenario(scenario_text(trials=1), name="x")
    sched = Schedule.from_segments(sc.actuator.channels, [Segment(0, 20.0, [0, 0, 0.8]), Segment(0, 20.0, [0.8, 0, 0])])
    run = run_scenario(sc, schedule=sched)
    outputs = dataclasses.replace(OutputSettings(), animation=True, animation_frames=6, dpi=40)
    files = write_outputs(tmp_path / "out", run, outputs=outputs)
    for role in ("workspace", "timeline", "inputs"):
        assert open(files[role], "rb").read(8) == b"\x89PNG\r\n\x1a\n"
    assert open(files["animation"], "rb").read(6) in (b"GIF89a", b"GIF87a")
    summary = json.loads(open(files["summary"]).read())
    assert sorted(summary["files"]) == listing(tmp_path / "out")
