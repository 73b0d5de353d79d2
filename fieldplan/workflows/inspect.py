"""The ``inspect`` job: what a scenario's actuator can do, before any plan, written as an output folder.

For each body kind: the primitive fields, the single-body worst-direction speed map and (with
``trials``) the count curve; for all bodies at their starts: the steerability analysis. The folder
holds ``inspect.md``, ``inspect.json`` and the figures ``fields-<kind>.png``,
``speed-map-<kind>.png``, ``count-curve-<kind>.png``.
"""

from __future__ import annotations

import json
import os

import numpy as np

from ..analysis import basis_function, count_curve, counting_limit, counting_rule, speed_map, steerability
from ..fileio import atomic_write, json_safe, output_folder
from ..plots.run import plot_primitive_fields
from ..plots.steerability import plot_count_curve, plot_speed_map
from ..plots.style import save
from ..units import format_quantity

__all__ = ["inspect_scenario", "default_counts", "file_stem"]


def file_stem(name):
    """``name`` with every character but letters, digits, ``-``, ``_`` and ``.`` replaced by ``_``."""
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in name)


def default_counts(sc, budget=6):
    """Body counts for the count curve: past the one-step counting limit, so the curve shows where it drops."""
    limit = counting_limit(sc.actuator.basis(sc.bodies[:1], sc.medium, sc.starts[:1]))
    return list(range(1, min(max(len(sc.bodies) + 1, int(limit) + 2), budget) + 1))


def inspect_scenario(sc, out, *, force=False, inputs=(), counts=None, grid=32, trials=0, progress=False):
    """Analyse ``sc``'s actuator and write the ``inspect`` output folder ``out`` atomically.

    Parameters
    ----------
    sc : Scenario
    out : str or os.PathLike
        Output folder (see :func:`fieldplan.fileio.output_folder` for ``force`` and ``inputs``).
    counts : sequence of int, optional
        Body counts of the count curves (default :func:`default_counts`).
    grid : int
        Cells per side of the speed maps.
    trials : int
        Random configurations per count (0: no count curves).
    progress : bool
        Show progress bars.

    Returns
    -------
    lines : list of str
        The Markdown report (also written as ``inspect.md``).
    report : dict
        The same as plain data (also written as ``inspect.json``).
    """
    counts = list(counts) if counts is not None else default_counts(sc)
    lines = [f"# {sc.name}: {sc.actuator.describe()}", ""]
    report = {"scenario": sc.name, "actuator": type(sc.actuator).__name__,
              "channels": [{"name": c.name, "unit": c.unit, "lower": c.lower, "upper": c.upper}
                           for c in sc.actuator.channels],
              "primitives": [p.name for p in sc.actuator.primitives()]}
    with output_folder(out, force, inputs, command="inspect") as tmp:
        kinds = list({b.name: b for b in sc.bodies}.values())
        for b in kinds:
            fig = plot_primitive_fields(sc.actuator, b, sc.medium, sc.workspace)
            save(fig, os.path.join(tmp, f"fields-{file_stem(b.name)}.png"))
        basis = sc.actuator.basis(sc.bodies, sc.medium, sc.starts)
        st = steerability(basis)
        lines += ["## All bodies at their starts", "", st.summary(), ""]
        report["at_start"] = {"steerable": st.steerable, "speed": st.speed, "rank": st.rank,
                              "condition": st.condition, "method": st.method}
        for b in kinds:
            bf = basis_function(sc.actuator, b, sc.medium)
            sm = speed_map(bf, sc.workspace, shape=(grid, grid))
            fig = plot_speed_map(sm, workspace=sc.workspace, actuator=sc.actuator,
                                 title=f"{b.name}: worst-direction speed of one body")
            save(fig, os.path.join(tmp, f"speed-map-{file_stem(b.name)}.png"))
            lines.append(f"## {b.name}: one body over the workspace")
            lines.append(f"mean worst-direction speed {format_quantity(sm.mean_speed, 'm/s')}; dead (some direction "
                         f"unavailable) on {100 * sm.dead_fraction:.1f} % of the free space")
            report.setdefault("speed_maps", {})[b.name] = {"mean_speed": sm.mean_speed,
                                                           "dead_fraction": sm.dead_fraction}
            if trials:
                cc = count_curve(bf, sc.workspace, counts, trials=trials, rng=sc.simulation.seed, progress=progress)
                fig = plot_count_curve({b.name: cc}, title="how many bodies can this actuator steer at once")
                save(fig, os.path.join(tmp, f"count-curve-{file_stem(b.name)}.png"))
                lines.append("bodies steerable now, fraction of random configurations: " + ", ".join(
                    f"N={n}: {fr:.2f}" for n, fr in zip(cc.counts, cc.fraction))
                    + f" (counting limit {counting_rule(cc.mode)} = {cc.counting_limit:g})")
                report.setdefault("count_curves", {})[b.name] = {
                    "counts": np.asarray(cc.counts).tolist(), "fraction": np.asarray(cc.fraction).tolist()}
            lines.append("")
        atomic_write(os.path.join(tmp, "inspect.md"), "\n".join(lines) + "\n")
        atomic_write(os.path.join(tmp, "inspect.json"), json.dumps(json_safe(report), indent=1, allow_nan=False))
    return lines, report
