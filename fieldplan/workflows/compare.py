"""Running scenarios and comparing actuation schemes on the same task.

:func:`run_scenario` is the unit of work: plan once (or replay a given schedule, or run the live
loop per trial), simulate the trials on the truth actuator, and collect metrics in a
:class:`RunResult`. :func:`compare` runs it over several scenarios or variants and seeds through a
``concurrent.futures.Executor`` (local processes by default; a dask.distributed ``Client`` when
given a scheduler address, see :func:`make_executor`) and returns a :class:`Comparison` with a
Markdown and CSV table and a bar chart.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import csv
import io
import json
import math
import os
import time
from dataclasses import dataclass, field

import numpy as np

from ..analysis import steerability
from ..contract.schedule import Schedule
from ..errors import FieldplanError
from ..fileio import atomic_write, json_safe, output_folder, save_figure
from ..planning.live import closed_loop
from ..planning.plan import plan
from ..progress import progress_bar
from ..units import format_quantity, si_scale
from ..world.simulate import compute_metrics, rollout

__all__ = ["TrialResult", "RunResult", "run_scenario", "replay_schedule_for", "Comparison", "compare",
           "make_executor", "InlineExecutor", "METRICS", "steerability_at_start", "write_comparison",
           "COMPARISON_FILES"]


@dataclass
class TrialResult:
    """One simulated execution: true trajectory and metrics (see :func:`fieldplan.world.simulate.compute_metrics`)."""

    seed: int
    success: bool
    message: str
    times: np.ndarray
    positions: np.ndarray
    metrics: dict
    schedule: object = None


@dataclass
class RunResult:
    """Everything ``fieldplan run`` reports and writes.

    Attributes
    ----------
    scenario : Scenario
    schedule : Schedule or None
        The schedule written for hardware (in closed-loop mode: the one played in trial 1).
    goals : ndarray, shape (n, 2)
        m, per body (after goal assignment for unlabelled goals).
    tolerance : float or None
        Arrival radius, m (None: each body's radius).
    plan_source : {"planner", "replay", "live"}
    plan_success : bool or None
        The planner's own verdict (None for a replayed schedule).
    trials : list of TrialResult
    """

    scenario: object
    schedule: object
    goals: np.ndarray
    tolerance: float | None = None
    plan_source: str = "planner"
    plan_success: bool | None = None
    plan_status: object = None
    plan_message: str = ""
    planning_time: float = 0.0
    step_times: list = field(default_factory=list)
    stalls: list = field(default_factory=list)
    bodies_report: list = field(default_factory=list)
    routes: list | None = None
    predicted_times: np.ndarray | None = None
    predicted_positions: np.ndarray | None = None
    trials: list = field(default_factory=list)

    @property
    def time_per_step(self):
        """Mean planning time per control step, s (nan when unknown)."""
        return float(np.mean(self.step_times)) if len(self.step_times) else float("nan")

    @property
    def success_rate(self):
        """Fraction of trials in which every body reached its goal (nan without trials)."""
        return float(np.mean([t.success for t in self.trials])) if self.trials else float("nan")

    @property
    def exit_code(self):
        """0: goals reached (plan and at least ``required_success`` of the trials); 1 otherwise."""
        if self.plan_success is False:
            return 1
        if self.trials and self.success_rate < self.scenario.simulation.required_success - 1e-12:
            return 1
        return 0

    @property
    def schedule_origin(self):
        """What :attr:`schedule` (``schedule.csv``) is, in words."""
        if self.schedule is None:
            return "no schedule"
        if self.plan_source == "live":
            seed = self.trials[0].seed if self.trials else self.scenario.simulation.seed
            return (f"the inputs played in trial 1 of the closed loop (seed {seed}); each trial re-plans from "
                    "its own tracked positions, so later trials played different inputs")
        if self.plan_source == "replay":
            return "the given schedule, replayed"
        return "the planned open-loop schedule, played by every trial"

    @property
    def message(self):
        parts = []
        if self.plan_source == "replay":
            parts.append("replayed the given schedule")
        elif self.plan_source == "live" and self.schedule is not None:
            parts.append("closed loop: schedule.csv holds the inputs played in trial 1")
        elif self.plan_success is not None:
            parts.append(("plan reached every goal" if self.plan_success else "plan did not reach every goal")
                         + (f" ({self.plan_message})" if self.plan_message and not self.plan_success else ""))
        if self.trials:
            ok = sum(t.success for t in self.trials)
            parts.append(f"{ok} of {len(self.trials)} trial(s) reached every goal")
            if ok < len(self.trials):
                first = next(t for t in self.trials if not t.success)
                parts.append(f"first miss: {first.message}")
        return "; ".join(parts)

    def aggregate(self):
        """Means over trials of the comparison metrics (SI), dict."""
        t = self.trials
        out = {"trials": len(t), "success_rate": self.success_rate,
               "planning_time": self.planning_time, "planning_time_per_step": self.time_per_step}
        if t:
            ttg = [x.metrics.get("time_to_goal", float("nan")) for x in t]
            out["time_to_goal"] = _nanmean(ttg)
            out["final_error"] = float(np.mean([np.mean(x.metrics.get("final_error", [np.nan])) for x in t]))
            out["final_error_max"] = float(np.max([np.max(x.metrics.get("final_error", [np.nan])) for x in t]))
            out["min_separation"] = float(np.min([x.metrics.get("min_separation", np.inf) for x in t]))
            out["contacts"] = float(np.mean([x.metrics.get("contacts", 0) for x in t]))
            out["wall_contacts"] = float(np.mean([x.metrics.get("wall_contacts", 0) for x in t]))
            keep = self._energy_channels()
            out["input_energy"] = float(np.mean([sum(v for k, v in x.metrics.get("input_energy", {}).items()
                                                     if k in keep) for x in t]))
        elif self.schedule is not None:
            keep = self._energy_channels()
            out["input_energy"] = float(sum(e for c, e in zip(self.schedule.channels, self.schedule.energy())
                                            if c.name in keep))
        return out

    def _energy_channels(self):
        """Channels whose squared value measures effort (not discrete settings such as a frequency)."""
        return {c.name for c in self.scenario.actuator.channels if not c.values}


def _nanmean(x):
    x = np.asarray(x, dtype=float)
    return float(np.nanmean(x)) if np.any(np.isfinite(x)) else float("nan")


def _quantised(schedule, limits):
    """The schedule as exported: on the hardware time step, values on each channel's resolution.

    Simulated and written alike, so the files hold exactly what the trials played
    (:meth:`fieldplan.contract.schedule.Schedule.quantise_values`).
    """
    if schedule is None or not schedule.n_segments:
        return schedule
    if limits is not None and limits.time_step and any(v[3] == "time_step" for v in schedule.violations(limits)):
        schedule = schedule.quantise(limits.time_step, limits.min_dwell or 0.0)
    return schedule.quantise_values(limits)


def replay_schedule_for(scenario, schedule):
    """Check that a schedule read from a file fits the scenario's actuator; returns it on its channels."""
    names = [c.name for c in scenario.actuator.channels]
    got = [c.name for c in schedule.channels]
    if got != names:
        raise FieldplanError(f"the schedule's channels {got} do not match the actuator's channels {names}.")
    for c, s in zip(scenario.actuator.channels, schedule.channels):
        if s.unit != c.unit:
            raise FieldplanError(f"channel {c.name!r}: the schedule gives {s.unit!r}, the actuator expects {c.unit!r}.")
    return Schedule(scenario.actuator.channels, schedule.starts, schedule.durations, schedule.values,
                    schedule.labels, schedule.meta)


def run_scenario(scenario, *, schedule=None, trials=None, seed=None, progress=False):
    """Plan (or replay), simulate the trials and collect metrics.

    Parameters
    ----------
    scenario : Scenario
    schedule : Schedule, optional
        Play this instead of planning (its channels must match the actuator's).
    trials : int, optional
        Overrides ``simulation.trials``.
    seed : int, optional
        Overrides ``simulation.seed``; trial k uses ``seed + k``.
    progress : bool
        Show a tqdm bar over trials (on stderr).

    Returns
    -------
    RunResult

    Raises
    ------
    LimitError
        The schedule breaks a declared limit.
    """
    sc = scenario
    sim = sc.simulation
    n_trials = sim.trials if trials is None else int(trials)
    seed0 = sim.seed if seed is None else int(seed)
    tol = sc.planner.get("tolerance")
    goals = np.asarray(sc.goals, dtype=float)
    run = RunResult(sc, None, goals, tol)
    if schedule is not None:
        run.schedule = _quantised(replay_schedule_for(sc, schedule), sc.limits)
        run.plan_source = "replay"
    elif sc.mode == "open_loop":
        t0 = time.perf_counter()
        res = plan(sc.actuator, sc.bodies, sc.workspace, sc.starts, sc.goals, limits=sc.limits,
                   settings=sc.plan_settings(), rng=seed0, **({"progress": True} if progress else {}))
        run.planning_time = time.perf_counter() - t0
        _take_plan(run, res)
        run.schedule = _quantised(res.schedule, sc.limits)
    else:
        run.plan_source = "live"
    if run.schedule is not None:
        run.schedule.check(sc.limits)
    if sc.mode == "closed_loop" and schedule is None:
        t_plan = 0.0
        for k in progress_bar(range(n_trials or 1), n_trials or 1, progress, "trials", unit="run"):
            t0 = time.perf_counter()
            live = closed_loop(sc.actuator, sc.truth_actuator, sc.bodies, sc.workspace, sc.starts, sc.goals,
                               limits=sc.limits, settings=sc.plan_settings(), rng=seed0 + k,
                               brownian=sim.brownian, tracking_noise=sim.tracking_noise, latency=sim.latency,
                               **sim.simulator_options())
            t_plan += time.perf_counter() - t0
            g = np.asarray(live.goals if live.goals is not None else goals, dtype=float)
            sched = live.schedule
            times = np.asarray(live.times, dtype=float)
            pos = np.asarray(live.positions, dtype=float)
            m = compute_metrics(times, pos, sc.bodies, g, tol, sched, live.events)
            if k == 0:
                run.schedule = _quantised(sched, sc.limits)
                if run.schedule is not None:
                    # a copy: quantising may return trial 1's own schedule, whose meta must not change
                    run.schedule = run.schedule.with_meta(
                        origin=(f"inputs played in trial 1 of the closed loop (seed {seed0}); "
                                "later trials re-planned and played different inputs"))
                run.goals = g
                run.step_times = list(live.step_times)
                run.routes = live.routes
                run.plan_success = None
                run.plan_message = live.message
            if n_trials:
                run.trials.append(TrialResult(seed0 + k, bool(m.get("all_reached", False)),
                                              _miss_message(sc, m), times, pos, m, sched))
        run.planning_time = t_plan
        if run.schedule is not None:
            run.schedule.check(sc.limits)
        return run
    for k in progress_bar(range(n_trials), n_trials, progress, "trials", unit="run"):
        r = rollout(run.schedule, sc.truth_actuator, sc.bodies, sc.workspace, sc.starts, run.goals,
                    tolerance=tol, rng=seed0 + k, brownian=sim.brownian, **sim.simulator_options())
        run.trials.append(TrialResult(seed0 + k, bool(r.success), r.message, r.times, r.positions, r.metrics))
    return run


def _miss_message(sc, m):
    if m.get("all_reached"):
        return "all bodies reached their goals"
    return "; ".join(f"body {i} ({b.name}) ended {format_quantity(m['final_error'][i], 'm')} from its goal"
                     for i, b in enumerate(sc.bodies) if not m["reached"][i])


def _take_plan(run, res):
    """Copy what a :class:`~fieldplan.planning.plan.PlanResult` reports onto ``run``."""
    run.plan_success = bool(res.success)
    run.plan_status = res.status
    run.plan_message = str(res.message)
    run.step_times = [float(x) for x in res.step_times]
    run.stalls = [str(s) for s in res.stalls]
    run.bodies_report = list(res.bodies_report)
    run.routes = [np.asarray(r, dtype=float) for r in res.routes]
    if res.times is not None and res.positions is not None and len(res.times):
        run.predicted_times = np.asarray(res.times, dtype=float)
        run.predicted_positions = np.asarray(res.positions, dtype=float)
    if res.goals is not None:
        run.goals = np.asarray(res.goals, dtype=float)


# ----------------------------------------------------------------------------------------------
# Executors
# ----------------------------------------------------------------------------------------------

class InlineExecutor(cf.Executor):
    """A ``concurrent.futures.Executor`` that runs each task at once in this process (``--workers 1``)."""

    def submit(self, fn, /, *args, **kwargs):
        fut = cf.Future()
        try:
            fut.set_result(fn(*args, **kwargs))
        except BaseException as exc:  # noqa: BLE001 - delivered through the future like a pool would
            fut.set_exception(exc)
        return fut


@contextlib.contextmanager
def make_executor(scheduler=None, workers=None, timeout=10.0):
    """The executor sweeps run on.

    Parameters
    ----------
    scheduler : str, optional
        Address of a dask.distributed scheduler (``tcp://host:8786``); needs the optional
        ``cluster`` extra (``pip install 'fieldplan[cluster]'``).
    workers : int, optional
        Local worker processes (default: CPU count); ``1`` runs in this process.
    timeout : float
        s to wait for the scheduler.

    Yields
    ------
    concurrent.futures.Executor
    """
    if scheduler:
        try:
            from dask.distributed import Client  # noqa: PLC0415 - optional extra
        except ImportError:
            raise FieldplanError("a scheduler address needs dask.distributed: pip install 'fieldplan[cluster]'.") from None
        try:
            client = Client(scheduler, timeout=f"{float(timeout)}s")
        except (OSError, TimeoutError) as exc:
            raise FieldplanError(f"cannot connect to the dask scheduler at {scheduler!r}: {exc}") from None
        try:
            yield client.get_executor()
        finally:
            client.close()
        return
    if workers is not None and workers <= 1:
        yield InlineExecutor()
        return
    import multiprocessing  # noqa: PLC0415

    # forkserver: workers start from a clean process, not a fork of one holding plotting/BLAS threads.
    ctx = multiprocessing.get_context("forkserver" if os.name == "posix" else "spawn")
    with cf.ProcessPoolExecutor(max_workers=workers or os.cpu_count() or 1, mp_context=ctx) as ex:
        yield ex


# ----------------------------------------------------------------------------------------------
# Comparison
# ----------------------------------------------------------------------------------------------

#: Columns of the comparison table: key, header, unit.
METRICS = (
    ("success_rate", "success rate", ""),
    ("time_to_goal", "time to goal", "s"),
    ("final_error", "final error", "m"),
    ("input_energy", "input energy", "unit^2 s"),
    ("input_power_fs", "mean input power", "% of full scale"),
    ("min_separation", "min separation", "m"),
    ("planning_time_per_step", "planning time per step", "s"),
    ("steerability", "worst-direction speed at start", "m/s"),
)


def steerability_at_start(scenario):
    """Worst-direction speed (m/s) of all bodies together at their starts, or nan if unavailable."""
    try:
        b = scenario.actuator.basis(scenario.bodies, scenario.medium, scenario.starts)
        s = steerability(b, method="auto")
    except Exception:  # noqa: BLE001 - a diagnostic column must not sink the comparison
        return float("nan"), None
    return float(s.speed), bool(s.steerable)


def _task(scenario, seed, trials):
    """One (variant, seed) run, reduced to plain numbers (cheap to send back from a worker)."""
    try:
        run = run_scenario(scenario, trials=trials, seed=seed)
    except FieldplanError as exc:
        return {"error": str(exc)}
    agg = run.aggregate()
    agg["input_power_fs"] = _full_scale_fraction(scenario, run)
    agg["plan_success"] = run.plan_success
    agg["plan_message"] = run.plan_message if run.plan_success is False else ""
    agg["successes"] = sum(t.success for t in run.trials)
    return agg


def _full_scale_fraction(scenario, run):
    """Mean input power as a percentage of full scale: ``energy / (sum_k max|bound_k|^2 * duration)``.

    Over the continuous channels only (as the input energy), per trial on the schedule that trial
    played (closed loop: its own), then averaged. Dimensionless, so variants driven in different
    units (coil amperes, plate-amplifier volts, electrode volts) share one axis; nan without a
    schedule.
    """
    keep = run._energy_channels()
    full = sum(max(abs(c.lower), abs(c.upper)) ** 2 for c in scenario.actuator.channels if c.name in keep)
    if not full > 0:
        return float("nan")
    played = [t.schedule if t.schedule is not None else run.schedule for t in run.trials] or [run.schedule]
    out = []
    for sched in played:
        if sched is None or not sched.duration > 0:
            continue
        energy = sum(e for c, e in zip(sched.channels, sched.energy()) if c.name in keep)
        out.append(100.0 * float(energy) / (full * sched.duration))
    return float(np.mean(out)) if out else float("nan")


def arrival_tolerance(scenario):
    """Arrival radius of a scenario, m: ``planner.tolerance``, else the smallest body radius."""
    tol = scenario.planner.get("tolerance")
    return float(tol) if tol else float(min(b.radius for b in scenario.bodies))


@dataclass
class Comparison:
    """Rows of a comparison, one per variant, with per-seed runs kept.

    Attributes
    ----------
    rows : list of dict
        ``label``, ``actuator``, ``runs``, ``errors``, ``tolerance`` (the arrival radius, m),
        ``required_success`` and, per metric in :data:`METRICS`, the mean and standard deviation
        over runs (``<key>`` and ``<key>_sd``, nan with fewer than two runs), SI.
    runs : dict
        label -> list of per-seed aggregate dicts.
    """

    rows: list
    runs: dict

    def to_csv(self):
        """CSV text: one row per variant, SI units in the headers."""
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        head = ["variant", "actuator", "runs", "failed runs", "steerable at start"]
        for key, title, unit in METRICS:
            u = f" [{unit}]" if unit else ""
            head += [f"{title}{u}", f"{title} sd{u}"] if key != "steerability" else [f"{title}{u}"]
        w.writerow(head)
        for r in self.rows:
            line = [r["label"], r["actuator"], r["runs"], r["errors"], r.get("steerable", "")]
            for key, _, _ in METRICS:
                line += [_csv_num(r.get(key))] + ([_csv_num(r.get(key + "_sd"))] if key != "steerability" else [])
            w.writerow(line)
        return buf.getvalue()

    def to_markdown(self):
        """Markdown table with readable SI prefixes."""
        head = ["variant", "actuator", "runs"] + [t for _, t, _ in METRICS]
        lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        for r in self.rows:
            cells = [r["label"], r["actuator"], f"{r['runs']}" + (f" ({r['errors']} failed)" if r["errors"] else "")]
            for key, _, unit in METRICS:
                v = r.get(key)
                sd = r.get(key + "_sd")
                if key == "success_rate":
                    need = r.get("required_success")
                    below = not _nan(v) and need is not None and v < need - 1e-12
                    cells.append("n/a" if _nan(v) else f"{100 * v:.0f} %"
                                 + (f" (below the required {100 * need:.0f} %)" if below else ""))
                elif key == "input_power_fs":
                    cells.append("n/a" if _nan(v) else f"{v:.3g} %" + (f" ± {sd:.2g}" if not _nan(sd) and sd else ""))
                elif key == "input_energy":
                    # Four significant digits and no exponent up to 1e4 ("3553 V^2 s", not "3.55e+03").
                    txt = "n/a" if _nan(v) else f"{v:.4g} {r.get('energy_unit', 'unit^2 s')}"
                    if not _nan(v) and not _nan(sd) and sd:
                        txt += f" ± {sd:.2g}"
                    cells.append(txt)
                else:
                    txt = format_quantity(v, unit)
                    if not _nan(sd) and sd and key != "steerability":
                        txt += f" ± {format_quantity(sd, unit)}"
                    cells.append(txt)
            lines.append("| " + " | ".join(cells) + " |")
        notes = [f"- {r['label']}: {r['plan_failures']} of {r['runs']} plan(s) did not reach every goal; first: "
                 f"{_shorten(r['plan_message'])}" for r in self.rows if r.get("plan_failures")]
        notes += [f"- {r['label']}: {r['errors']} run(s) failed: {_shorten(r['error_messages'][0])}"
                  for r in self.rows if r.get("errors")]
        if notes:
            lines += ["", "Notes:"] + notes
        lines.append("")
        lines.append("Means over runs (± standard deviation when there are two or more); time to goal over "
                     "successful runs only; input energy is the integral of the squared channel values summed over "
                     "the continuous channels (discrete settings such as a drive frequency are left out), in the "
                     "channels' own units (compare it only between variants with the same channel units); mean input "
                     "power is that energy over the schedule's duration, as a percentage of all those channels held at "
                     "full scale (comparable across units); worst-direction speed of all bodies together at their "
                     "starts (fieldplan.analysis). A variant below its required success rate is marked; the "
                     "comparison itself succeeded.")
        return "\n".join(lines)

    def bar_chart(self):
        """Figure with one panel per metric, one bar per variant.

        Variants of different scale share one figure only through dimensionless panels: final error
        and minimum separation are drawn relative to each variant's arrival radius (``tolerance``:
        a 5 mm dish, a 180 mm plate and a 0.24 mm chip then read alike, 1 = the arrival radius),
        and input power as a percentage of the variant's full scale (coil amperes and amplifier or
        electrode volts are never put on one axis). Every bar is labelled with its value (absolute
        values in their own SI prefix). A whisker is one standard deviation over runs and is drawn
        only with two or more runs; the success panel marks each variant's required rate.
        """
        import matplotlib  # noqa: PLC0415
        from matplotlib.figure import Figure  # noqa: PLC0415
        from matplotlib.patches import Rectangle  # noqa: PLC0415

        # deferred import: start-up time of the CLI: matplotlib loads only when a figure is drawn
        from ..plots import axis_label  # noqa: PLC0415

        tol = np.array([r.get("tolerance") or np.nan for r in self.rows], dtype=float)
        panels = []  # (key, title, values, sds, axis unit label, value texts)
        for key, title, unit in METRICS:
            if key == "input_energy" or not any(not _nan(r.get(key)) for r in self.rows):
                continue
            vals = np.array([np.nan if _nan(r.get(key)) else r[key] for r in self.rows], dtype=float)
            sds = np.array([np.nan if _nan(r.get(key + "_sd")) else r[key + "_sd"] for r in self.rows], dtype=float)
            if key == "success_rate":
                panels.append((key, title, 100 * vals, np.full_like(vals, np.nan), "%",
                               ["n/a" if not np.isfinite(v) else f"{100 * v:.0f} %" for v in vals]))
            elif key in ("final_error", "min_separation"):
                texts = ["n/a" if not np.isfinite(v) else f"{v / t:.2g}\n({format_quantity(v, unit)})"
                         for v, t in zip(vals, tol)]
                panels.append((key, f"{title} / arrival radius", vals / tol, sds / tol, "1", texts))
            elif key == "input_power_fs":
                panels.append((key, title, vals, sds, "% of full scale",
                               ["n/a" if not np.isfinite(v) else f"{v:.3g} %" for v in vals]))
            else:
                f, label = si_scale(float(np.nanmax(np.abs(vals))), unit)
                panels.append((key, title, vals * f, sds * f, label,
                               [format_quantity(v, unit) for v in vals]))
        n = len(panels)
        cols = min(3, max(n, 1))
        rows = int(math.ceil(n / cols)) or 1
        fig = Figure(figsize=(4.4 * cols, 3.3 * rows + 0.6), layout="constrained")
        axes = fig.subplots(rows, cols, squeeze=False)
        labels = [r["label"] for r in self.rows]
        colours = matplotlib.rcParams["axes.prop_cycle"].by_key()["color"]
        # Variant names often share a prefix ("scenario/"); the legend carries the full names.
        short = _short_labels(labels)
        x = np.arange(len(labels))
        wide = max(len(t) for t in short) > 10
        for ax, (key, title, vals, sds, ulabel, texts) in zip(axes.flat, panels):
            shown = np.nan_to_num(vals)
            # A standard deviation needs two runs: no whisker (not even a zero one) otherwise.
            err = np.where(np.isfinite(sds), sds, 0.0)
            ax.bar(x, shown, color=[colours[i % len(colours)] for i in range(len(labels))],
                   yerr=err if np.any(np.isfinite(sds)) else None, capsize=3, error_kw={"lw": 0.8})
            top = float(np.nanmax(np.r_[shown + err, 0.0]))
            if key == "success_rate":
                need = [100 * float(r.get("required_success", 1.0)) for r in self.rows]
                ax.hlines(need, x - 0.4, x + 0.4, colors="k", linestyles="--", lw=0.9)
                ax.set_ylim(0, 118)
                ax.set_yticks([0, 25, 50, 75, 100])
            elif key in ("final_error", "min_separation"):
                ax.axhline(1.0, color="k", ls="--", lw=0.8)
                top = max(top, 1.0)
                ax.set_ylim(0, 1.25 * top)
            else:
                ax.set_ylim(0, 1.2 * top if top > 0 else 1.0)
            for i, txt in enumerate(texts):
                ax.annotate(txt, (x[i], max(shown[i] + err[i], 0.0)), xytext=(0, 2), textcoords="offset points",
                            ha="center", va="bottom", fontsize=7.5)
            ax.set_xticks(x, short, rotation=20 if wide else 0, ha="right" if wide else "center", fontsize=8)
            ax.set_title(title, fontsize=10)
            short_title = title.replace("final error", "error").replace("min separation", "separation")
            ax.set_ylabel(axis_label(short_title, ulabel), fontsize=9)
            ax.grid(axis="y", alpha=0.3)
        for ax in list(axes.flat)[n:]:
            ax.set_visible(False)
        handles = [Rectangle((0, 0), 1, 1, color=colours[i % len(colours)]) for i in range(len(labels))]
        notes = []
        if any(k in ("final_error", "min_separation") for k, *_ in panels):
            notes.append("error and separation relative to each variant's arrival radius (dashed: 1)")
        if "success_rate" in [p[0] for p in panels]:
            notes.append("dashed on success: required rate")
        runs = sorted({r["runs"] for r in self.rows})
        notes.append(f"{'/'.join(map(str, runs))} run(s) per variant" + ("; whiskers: ± 1 standard deviation"
                                                                          if max(runs) > 1 else ""))
        fig.legend(handles, labels, loc="outside upper center", ncol=min(len(labels), 4), fontsize=8, frameon=False)
        fig.text(0.5, 0.0, "; ".join(notes), ha="center", va="bottom", fontsize=7.5, color="0.3")
        fig.get_layout_engine().set(rect=(0, 0.03, 1, 0.97))
        return fig


def _short_labels(labels):
    """Variant labels without the prefix they all share up to a '/' (kept whole if that leaves nothing)."""
    if len(labels) < 2:
        return list(labels)
    common = os.path.commonprefix(list(labels))
    cut = common.rfind("/") + 1
    out = [lab[cut:] for lab in labels]
    return out if cut and all(out) else list(labels)


def _shorten(text, n=300):
    text = " ".join(str(text).split())
    return text if len(text) <= n else text[: n - 3] + "..."


def _nan(v):
    return v is None or (isinstance(v, float) and not math.isfinite(v))


def _csv_num(v):
    if v is None:
        return ""
    if isinstance(v, float) and not math.isfinite(v):
        return "" if math.isnan(v) else repr(v)
    return repr(float(v))


def compare(scenarios, *, seeds=(0,), trials=1, executor=None, progress=False):
    """Run every scenario (variant) for every seed and tabulate the metrics.

    Parameters
    ----------
    scenarios : sequence of Scenario
        The variants (labels from ``Scenario.name``; make them unique).
    seeds : sequence of int
        Each variant is planned and simulated once per seed (trials ``seed, seed+1, ...``).
    trials : int
        Trials per (variant, seed).
    executor : concurrent.futures.Executor, optional
        Default :class:`InlineExecutor` (this process).
    progress : bool
        tqdm bar over runs.

    Returns
    -------
    Comparison
    """
    scenarios = list(scenarios)
    names = [s.name for s in scenarios]
    if len(set(names)) != len(names):
        raise FieldplanError(f"comparison labels must be unique, got {names}.")
    ex = executor if executor is not None else InlineExecutor()
    futures = {}
    for s in scenarios:
        for seed in seeds:
            futures[ex.submit(_task, s, int(seed), int(trials))] = (s.name, int(seed))
    results = {s.name: [] for s in scenarios}
    for fut in progress_bar(cf.as_completed(futures), len(futures), progress, "runs", unit="run"):
        label, seed = futures[fut]
        try:
            res = fut.result()
        except Exception as exc:  # noqa: BLE001 - one broken variant is reported in its row
            res = {"error": f"{type(exc).__name__}: {exc}"}
        res["seed"] = seed
        results[label].append(res)
    rows = []
    for s in scenarios:
        runs = sorted(results[s.name], key=lambda r: r["seed"])
        ok = [r for r in runs if "error" not in r]
        row = {"label": s.name, "actuator": type(s.actuator).__name__, "runs": len(runs),
               "errors": len(runs) - len(ok), "error_messages": [r["error"] for r in runs if "error" in r],
               "tolerance": arrival_tolerance(s), "required_success": float(s.simulation.required_success)}
        units = sorted({c.unit for c in s.actuator.channels if not c.values})
        if len(units) != 1:
            row["energy_unit"] = "mixed units"
        else:
            row["energy_unit"] = "s" if units[0] in ("1", "") else f"{units[0]}^2 s"
        for key, _, _ in METRICS:
            if key == "steerability":
                continue
            vals = np.array([r.get(key, np.nan) if r.get(key) is not None else np.nan for r in ok], dtype=float)
            finite = vals[np.isfinite(vals)]
            if key == "min_separation":
                row[key] = float(finite.min()) if finite.size else float("nan")
                row[key + "_sd"] = float("nan")
                continue
            row[key] = float(finite.mean()) if finite.size else float("nan")
            row[key + "_sd"] = float(finite.std()) if finite.size > 1 else float("nan")
        row["steerability"], row["steerable"] = steerability_at_start(s)
        row["plan_failures"] = sum(1 for r in ok if r.get("plan_success") is False)
        row["plan_message"] = next((r["plan_message"] for r in ok if r.get("plan_message")), "")
        rows.append(row)
    return Comparison(rows, results)


#: Files of a ``compare`` output folder.
COMPARISON_FILES = ("comparison.md", "comparison.csv", "comparison.json", "comparison.png")


def write_comparison(out, comparison, *, seeds, trials, force=False, inputs=()):
    """Write the ``compare`` output folder atomically: table (Markdown, CSV), every run (JSON), bar chart.

    Returns
    -------
    list of str
        The paths written (:data:`COMPARISON_FILES` in ``out``).
    """
    out = os.path.abspath(os.fspath(out))
    with output_folder(out, force, inputs, command="compare") as tmp:
        md, csv_, js, png = (os.path.join(tmp, n) for n in COMPARISON_FILES)
        atomic_write(md, comparison.to_markdown() + "\n")
        atomic_write(csv_, comparison.to_csv())
        atomic_write(js, json.dumps(json_safe({"seeds": list(seeds), "trials": trials, "rows": comparison.rows,
                                               "runs": comparison.runs}), indent=1, allow_nan=False))
        save_figure(comparison.bar_chart(), png, dpi=120)
    return [os.path.join(out, n) for n in COMPARISON_FILES]
