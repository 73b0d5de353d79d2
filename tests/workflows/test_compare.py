"""Comparisons (fieldplan.workflows.compare) and the polish of issue 16 items 10-13 around them.

Covers: `compare` exits 0 when the comparison ran, whatever each variant's success; the chart puts
variants of different scale on dimensionless axes (error and separation over each arrival radius,
input power as a percentage of full scale); no whiskers with one run; the closed-loop schedule is
said to be trial 1's; `run`/`inspect` say they ignore `variants`; `-q` silences warnings; `schema`
lists every planner default.
"""

import json
import textwrap

import numpy as np
import pytest

from fieldplan.cli import main
from fieldplan.scenario import load_scenario
from fieldplan.workflows.compare import METRICS, Comparison, _full_scale_fraction, arrival_tolerance

BASE = textwrap.dedent("""\
    name: cmp-test
    workspace:
      boundary: {rectangle: [0, 0, 1 mm, 1 mm]}
    bodies:
      - {kind: bead, radius: 5 um, density: 1050 kg/m^3}
    starts: [[0.3 mm, 0.5 mm]]
    goals: [[0.7 mm, 0.5 mm]]
    actuator:
      type: source-array
      sources: [[0, 0], [1 mm, 0], [1 mm, 1 mm], [0, 1 mm]]
      force: 3 pN
    limits:
      time_step: 10 ms
    planner:
      tolerance: 20 um
    simulation:
      trials: 1
      brownian: false
    outputs:
      plots: false
    """)

VARIANTS = textwrap.dedent("""\
    variants:
      - name: fine
      - name: hopeless
        planner: {tolerance: 20 um, time_limit: 0.05 s}
    """)


def write(tmp_path, text, name="s.yaml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def row(label, final_error, sep, tol, runs=1, energy=1.0, sd=np.nan, success=1.0, need=1.0):
    r = {"label": label, "actuator": "X", "runs": runs, "errors": 0, "error_messages": [], "tolerance": tol,
         "required_success": need, "steerable": True, "plan_failures": 0, "plan_message": ""}
    for key, _, _ in METRICS:
        r[key], r[key + "_sd"] = 1.0, sd
    r.update(success_rate=success, final_error=final_error, min_separation=sep, input_power_fs=energy,
             input_energy=energy, energy_unit="V^2 s", steerability=1e-4)
    return r


def test_compare_exits_0_when_the_comparison_ran_and_marks_the_failing_variant(tmp_path, capsys):
    """A comparison whose failing variant is the point (issue 16 item 12) exits 0; the table says
    which variant fell below its required success rate."""
    out = tmp_path / "cmp"
    code = main(["compare", str(write(tmp_path, BASE + VARIANTS)), "--seeds", "1", "--workers", "1",
                 "--out", str(out), "--quiet"])
    assert code == 0
    rows = {r["label"]: r for r in json.loads((out / "comparison.json").read_text())["rows"]}
    assert rows["cmp-test/hopeless"]["success_rate"] == 0.0
    assert rows["cmp-test/hopeless"]["tolerance"] == pytest.approx(20e-6)
    md = (out / "comparison.md").read_text()
    assert "0 % (below the required 100 %)" in md
    assert "mean input power" in md


def test_run_and_inspect_say_they_ignore_variants_and_q_silences_it(tmp_path, capsys):
    path = write(tmp_path, BASE + VARIANTS)
    code = main(["run", str(path), "--out", str(tmp_path / "o"), "--trials", "0"])
    err = capsys.readouterr().err
    assert code in (0, 1)
    assert "defines 2 variants (fine, hopeless)" in err and "base scenario only" in err and "fieldplan compare" in err
    main(["run", str(path), "--out", str(tmp_path / "o2"), "--trials", "0", "-q"])
    captured = capsys.readouterr()
    assert "warning" not in captured.err and captured.out == ""
    code = main(["inspect", str(path), "--out", str(tmp_path / "i"), "--trials", "1", "--grid", "6",
                 "--counts", "1"])
    assert code == 0 and "`fieldplan inspect` inspects the base scenario only" in capsys.readouterr().err


def test_inspect_prints_the_one_counting_limit(tmp_path, capsys):
    """Time-shared primitives: (M - 1)/2, not K/2 (issue 16 item 11)."""
    text = BASE.replace("  force: 3 pN", "  force: 3 pN\n  affine: false")
    code = main(["inspect", str(write(tmp_path, text)), "--out", str(tmp_path / "i"), "--trials", "2",
                 "--grid", "6", "--counts", "1,2"])
    out = capsys.readouterr().out
    assert code == 0
    sc = load_scenario(text, name="x")
    m = len(sc.actuator.primitives())
    assert f"counting limit (M - 1)/2 = {(m - 1) / 2:g}" in out and "K/2" not in out


def test_schema_lists_every_planner_default(capsys):
    from fieldplan.planning.plan import PlanSettings

    assert main(["schema"]) == 0
    text = capsys.readouterr().out
    section = text.split("### `planner`")[1].split("###")[0]
    assert "| `*` |" not in section
    for name in PlanSettings.__dataclass_fields__:
        if name == "assign_goals":
            continue        # a scenario sets it through goals.unlabelled, so the planner section omits it
        assert f"| `{name}` |" in section, name
    assert "| `assign_goals` |" not in section
    # A None default shows what it becomes (its default_text metadata).
    assert "| `horizon` | int |  | 2 / trust_fraction, within 8 to 30 (step method: 1) | Periods the program looks ahead." \
        in section


def test_chart_is_relative_to_each_tolerance_and_has_no_whiskers_with_one_run():
    """A 5 mm dish, a 180 mm plate and a 0.24 mm chip: final error and separation over each arrival
    radius, input power in % of full scale, no error bars with n = 1."""
    rows = [row("dish", 38e-6, 1e-3, 100e-6), row("plate", 902e-6, 23e-3, 2e-3), row("chip", 2.49e-6, 43.6e-6, 8e-6)]
    fig = Comparison(rows, {}).bar_chart()
    panels = {ax.get_title(): ax for ax in fig.axes if ax.get_visible()}
    err = panels["final error / arrival radius"]
    heights = [p.get_height() for p in err.patches]
    np.testing.assert_allclose(heights, [0.38, 0.451, 2.49 / 8], rtol=1e-9)
    assert err.get_ylabel() == "error / arrival radius [1]"
    sep = panels["min separation / arrival radius"]
    np.testing.assert_allclose([p.get_height() for p in sep.patches], [10.0, 11.5, 5.45], rtol=1e-9)
    assert "input energy" not in panels and "mean input power" in panels
    assert panels["mean input power"].get_ylabel() == "mean input power [% of full scale]"
    # n = 1: no whisker containers at all
    for ax in panels.values():
        assert not any(c.has_yerr for c in ax.containers if hasattr(c, "has_yerr")), ax.get_title()
    # n = 3 with a spread: whiskers on the time panel
    fig = Comparison([row("a", 1e-6, 1e-3, 1e-5, runs=3, sd=0.1), row("b", 2e-6, 1e-3, 1e-5, runs=3, sd=0.2)],
                     {}).bar_chart()
    ax = next(a for a in fig.axes if a.get_title() == "time to goal")
    assert any(getattr(c, "has_yerr", False) for c in ax.containers)


def test_input_power_is_a_fraction_of_full_scale():
    """One channel held at half scale for the whole schedule: 25 % of full-scale power."""
    from fieldplan.contract.schedule import Schedule, Segment
    from fieldplan.workflows.compare import RunResult

    sc = load_scenario(BASE, name="x")
    ch = sc.actuator.channels
    u = [0.5 * c.upper if k == 0 else 0.0 for k, c in enumerate(ch)]
    sched = Schedule.from_segments(ch, [Segment(0, 2.0, u)])
    run = RunResult(sc, sched, np.zeros((1, 2)))
    full = sum(max(abs(c.lower), abs(c.upper)) ** 2 for c in ch)
    frac = _full_scale_fraction(sc, run)
    assert frac == pytest.approx(100 * 0.25 * ch[0].upper ** 2 / full)
    assert arrival_tolerance(sc) == pytest.approx(20e-6)
    assert arrival_tolerance(load_scenario(BASE.replace("  tolerance: 20 um\n", "  horizon: 1\n"), name="y")) \
        == pytest.approx(5e-6)


@pytest.mark.parametrize("already_quantised", [False, True])
def test_closed_loop_schedule_is_said_to_be_trial_ones(tmp_path, monkeypatch, already_quantised):
    from fieldplan.workflows import compare
    from fieldplan.workflows.compare import run_scenario

    if already_quantised:          # quantising then returns trial 1's own schedule object
        monkeypatch.setattr(compare, "_quantised", lambda schedule, limits: schedule)

    text = BASE.replace("planner:\n  tolerance: 20 um", "planner:\n  mode: closed_loop\n  tolerance: 20 um\n"
                                                        "  max_steps: 30")
    sc = load_scenario(text, name="cl")
    run = run_scenario(sc, trials=1)
    assert run.schedule is not None
    assert "trial 1" in run.schedule_origin and "trial 1" in run.message
    assert "trial 1" in run.schedule.meta["origin"]
    # the trial keeps the schedule it played, its meta untouched by the export note
    assert run.trials[0].schedule is not run.schedule and "origin" not in run.trials[0].schedule.meta


def test_miss_message_uses_si_prefixes():
    from fieldplan.workflows.compare import _miss_message

    sc = load_scenario(BASE, name="x")
    msg = _miss_message(sc, {"all_reached": False, "reached": [False], "final_error": [0.0538]})
    assert msg == "body 0 (bead) ended 53.8 mm from its goal"
