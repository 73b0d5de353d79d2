"""The ``fieldplan`` command: run, compare, inspect and validate scenarios; fit calibrated actuators.

Exit codes: 0 success; 1 planned (or replayed) but some goal was not reached; 2 bad input (the
message names file, line and key, or channel, time and limit; no traceback); 3 internal error (a
bug: the traceback is printed); 130 interrupted (Ctrl-C), 143 terminated (SIGTERM; 129 for SIGHUP),
leaving no partial output. ``fieldplan <subcommand> --help`` shows each subcommand with an example.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import textwrap
import time

from . import __version__
from .contract.registry import available_actuators, load_actuator_class
from .contract.schedule import Schedule
from .errors import FieldplanError, LimitError, ScenarioError
from .fileio import check_output_folder, clean_stale_temps, output_folder
from .lab.commands import add_commands as _add_lab_commands, cmd_play, cmd_track
from .units import format_quantity
from .workflows.design import add_command as _add_design_command, design_command
from .workflows.export import write_outputs

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_NOT_REACHED", "EXIT_BAD_INPUT", "EXIT_INTERNAL"]

EXIT_OK, EXIT_NOT_REACHED, EXIT_BAD_INPUT, EXIT_INTERNAL = 0, 1, 2, 3


class UserError(Exception):
    """A problem with what the user gave us (exit 2, no traceback)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own exit code for usage errors is 2 as well; keep one format
        self.print_usage(sys.stderr)
        self.exit(EXIT_BAD_INPUT, f"fieldplan: error: {message}\n")


def _fmt(description, example):
    return argparse.RawDescriptionHelpFormatter, textwrap.dedent(description).strip() + \
        "\n\nexample:\n" + textwrap.indent(textwrap.dedent(example).strip(), "  ")


def build_parser():
    """The argparse parser of the ``fieldplan`` command."""
    p = _Parser(prog="fieldplan", formatter_class=argparse.RawDescriptionHelpFormatter,
                description="Plan timed input sequences that steer several small bodies with a few shared "
                            "field inputs; simulate, export for hardware, compare actuation schemes.",
                epilog="exit codes: 0 success, 1 some goal not reached, 2 bad input, 3 internal error.\n"
                       "example:\n  fieldplan run scenarios/demo.yaml --out demo-output")
    p.add_argument("--version", action="version", version=f"fieldplan {__version__}")
    sub = p.add_subparsers(dest="command", metavar="<command>", parser_class=_Parser)

    def add(name, help_, description, example):
        fmt, desc = _fmt(description, example)
        return sub.add_parser(name, help=help_, description=desc, formatter_class=fmt)

    r = add("run", "plan a scenario, simulate its trials and write the output folder",
            """
            Plan the scenario (or replay a schedule), simulate the trials on the truth actuator, check
            the schedule against the declared limits and write the output folder: schedule.csv,
            schedule.json, trajectories.csv, summary.json and PNG plots (see the README for the
            layouts). Nothing is written if the schedule breaks a limit (exit 2).
            """,
            """
            fieldplan run scenarios/demo.yaml --out demo-output --force
            fieldplan run my-dish.yaml --trials 20 --seed 3 --out runs/seed3
            fieldplan run my-dish.yaml --schedule runs/seed3/schedule.csv --out replay   # replay on the truth model
            """)
    r.add_argument("scenario", help="scenario YAML file")
    r.add_argument("--out", "-o", default=None, help="output folder (default: <scenario name>-output)")
    r.add_argument("--force", action="store_true", help=_FORCE_HELP)
    _allow_module_arg(r)
    r.add_argument("--trials", type=_bounded_int(0, MAX_TRIALS), default=None, help="override simulation.trials")
    r.add_argument("--seed", type=_nonneg_int, default=None, help="override simulation.seed")
    r.add_argument("--schedule", default=None, metavar="CSV_OR_JSON",
                   help="replay this schedule instead of planning (its channels must match the actuator)")
    r.add_argument("--no-plots", action="store_true", help="skip the PNG plots and the animation")
    r.add_argument("--quiet", "-q", action="store_true", help="print errors only")

    c = add("compare", "run several scenarios or variants over seeds and tabulate the metrics",
            """
            Run every scenario file (a file with a `variants` list contributes one row per variant, a
            file without one row) for every seed, and write comparison.md, comparison.csv,
            comparison.json and comparison.png (bar chart) to the output folder. Runs go to local
            worker processes, or to a dask.distributed scheduler with --scheduler. Exit code 0 when
            the comparison ran (each variant's success is in the table), 1 only when every run failed.
            """,
            """
            fieldplan compare scenarios/compare-all.yaml --seeds 4 --out cmp
            fieldplan compare coils.yaml electrodes.yaml --seeds 0,1,2 --workers 2 --out cmp --force
            fieldplan compare big.yaml --seeds 50 --scheduler tcp://10.0.0.5:8786 --out cmp
            """)
    c.add_argument("scenarios", nargs="+", help="scenario YAML files")
    c.add_argument("--out", "-o", default="comparison", help="output folder (default: comparison)")
    c.add_argument("--force", action="store_true", help=_FORCE_HELP)
    _allow_module_arg(c)
    c.add_argument("--seeds", default="3", help="a count N (seeds 0..N-1) or a comma list (default 3)")
    c.add_argument("--trials", type=_bounded_int(0, MAX_TRIALS), default=1,
                   help="trials per (variant, seed) (default 1)")
    c.add_argument("--workers", type=_nonneg_int, default=None,
                   help="local worker processes (default: CPU count; 1: run in this process)")
    c.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="dask.distributed scheduler address, e.g. tcp://host:8786 (needs fieldplan[cluster])")
    c.add_argument("--quiet", "-q", action="store_true", help="print errors only")

    i = add("inspect", "field plots per primitive and the steerability summary of a scenario's actuator",
            """
            Plot each primitive's velocity field for every body kind, the worst-direction speed map of
            one body over the workspace (dead zones), the "how many bodies can it steer" curve, and
            print the steerability of all bodies at their starts (fieldplan.analysis).
            """,
            """
            fieldplan inspect scenarios/coils.yaml --out coils-inspect
            fieldplan inspect scenarios/plate.yaml --counts 1,2,3,4 --trials 20 --out plate-inspect --force
            """)
    i.add_argument("scenario", help="scenario YAML file")
    i.add_argument("--out", "-o", default=None, help="output folder (default: <scenario name>-inspect)")
    i.add_argument("--force", action="store_true", help=_FORCE_HELP)
    _allow_module_arg(i)
    i.add_argument("--counts", default=None, help="body counts of the steerability curve, e.g. 1,2,3 "
                                                  "(default 1..number of bodies + 1)")
    i.add_argument("--trials", type=_bounded_int(0, MAX_INSPECT_TRIALS), default=20,
                   help=f"random configurations per count (default 20, at most {MAX_INSPECT_TRIALS})")
    i.add_argument("--grid", type=_bounded_int(2, MAX_INSPECT_GRID), default=32,
                   help=f"speed-map grid points per side (default 32, at most {MAX_INSPECT_GRID})")
    i.add_argument("--quiet", "-q", action="store_true", help="print errors only")

    v = add("validate", "check scenario files without running them",
            """
            Read and validate each file, reporting every problem at once with file, line and key. With
            --normalised, print the file in its normalised SI form (what `fieldplan run` uses).
            validate never imports or runs code: an actuator given as `module:Class` that is not a
            registered plug-in is reported as not checked.
            """,
            """
            fieldplan validate scenarios/*.yaml
            fieldplan validate my-dish.yaml --normalised > my-dish.si.yaml
            """)
    v.add_argument("scenarios", nargs="+", help="scenario YAML files")
    v.add_argument("--normalised", action="store_true", help="print the normalised SI YAML of each file")
    v.add_argument("--quiet", "-q", action="store_true", help="print errors only")

    f = add("fit", "fit a calibrated actuator from a tracking CSV (fieldplan.calibration.calibrate)",
            """
            Read tracks, differentiate them, fit one smooth velocity field per primitive, and write the
            calibrated actuator (<name>.npz + <name>.json, usable in a scenario as
            `actuator: {type: calibrated, path: <folder>/<name>.json}`) with a report and plots.
            """,
            """
            fieldplan fit scenarios/calibration/tracks.csv --out calib
            fieldplan fit tracks.csv --out calib --name dish3 --primitives coil_1+,coil_2+ --units x=um,y=um
            """)
    f.add_argument("tracks", help="tracking CSV (layout in fieldplan.calibration.tracking)")
    f.add_argument("--out", "-o", required=True, help="output folder")
    f.add_argument("--force", action="store_true", help=_FORCE_HELP)
    f.add_argument("--skip-bad-rows", action="store_true",
                   help="skip unreadable rows (bad quoting, wrong cell count, non-numbers) and report them, "
                        "instead of stopping at the first")
    f.add_argument("--name", default="actuator", help="stem of the output files (default: actuator)")
    f.add_argument("--idle", default=None, help="name of the idle (all-off) primitive in the data")
    f.add_argument("--primitives", default=None, help="fit only these primitives (comma list)")
    f.add_argument("--units", default=None, help="units of columns without [unit] in the header: col=unit,...")
    f.add_argument("--no-plots", action="store_true", help="skip the report plots")
    f.add_argument("--note", default=None,
                   help="free text stored in the actuator JSON (e.g. where the data came from); default: "
                        "the note of the actuator file being replaced, if any")
    f.add_argument("--quiet", "-q", action="store_true", help="print errors only")

    s = add("schema", "print the scenario key reference and the registered actuators",
            """
            Print every section and key of the scenario format (type, unit, default, meaning) as
            Markdown, then the registered actuators with their constructor parameters.
            """,
            """
            fieldplan schema > SCENARIO-REFERENCE.md
            """)
    s.add_argument("--actuators-only", action="store_true", help="only list the registered actuators")
    _add_design_command(add)
    _add_lab_commands(add, _nonneg_int)
    return p


_FORCE_HELP = ("replace the output folder if fieldplan wrote it (never the working folder, home, a folder holding "
               "an input or other files)")

#: Largest --grid and --trials of ``inspect`` (the speed map solves one LP per grid point).
MAX_INSPECT_GRID, MAX_INSPECT_TRIALS = 512, 100_000
#: Largest --trials of ``run`` and ``compare`` (as ``simulation.trials``), and number of --seeds.
MAX_TRIALS, MAX_SEEDS = 100_000, 100_000


def _allow_module_arg(p):
    p.add_argument("--allow-module", action="append", default=[], metavar="MODULE",
                   help="import this module for a `type: module:Class` actuator that is not a registered plug-in "
                        "(repeatable; runs the module's code; the file imported is printed). Or list it under "
                        "allow_modules in the user configuration file")


def _bounded_int(lo, hi):
    def parse(text):
        v = _nonneg_int(text)
        if not lo <= v <= hi:
            raise argparse.ArgumentTypeError(f"expected a whole number from {lo} to {hi}, got {v}")
        return v

    return parse


def _nonneg_int(text):
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a number >= 0, got {v}")
    return v


def say(args, *lines, err=False):
    """Print lines for the user (stdout, or stderr with ``err``); ``--quiet`` silences all but errors."""
    if getattr(args, "quiet", False) and not err:
        return
    print(*lines, sep="\n", file=sys.stderr if err else sys.stdout, flush=True)


def _warn(args, text):
    """A warning on stderr, unless ``-q`` (which prints errors only)."""
    if not getattr(args, "quiet", False):
        print(f"warning: {text}", file=sys.stderr, flush=True)


def show_progress(args):
    """Whether to draw progress bars: not ``--quiet`` and stderr is a terminal."""
    return not getattr(args, "quiet", False) and sys.stderr.isatty()


def load_for_command(path, args, check_only=False):
    """Load a scenario file for a command, announcing plug-ins it imports; errors become :class:`UserError`."""
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .scenario import load_scenario  # noqa: PLC0415

    def announce(module, origin, why):
        print(f"note: importing actuator module {module!r} from {origin} ({why}); its code runs now.",
              file=sys.stderr, flush=True)

    sc = load_scenario(path, allow_modules=getattr(args, "allow_module", None) or (), on_import=announce,
                       check_only=check_only, progress=show_progress(args))
    for w in sc.warnings:
        _warn(args, w)
    return sc


def _note_variants(args, sc, command, verb):
    """Say that ``run``/``inspect`` use the base scenario of a file with ``variants`` (never silently)."""
    if sc.variants:
        n = len(sc.variants)
        names = [v.name[len(sc.name) + 1:] if v.name.startswith(sc.name + "/") else v.name for v in sc.variants]
        _warn(args, f"{sc.source or sc.name} defines {n} variant{'s' if n != 1 else ''} "
                    f"({', '.join(names[:4])}{', ...' if n > 4 else ''}); "
                    f"`fieldplan {command}` {verb} the base scenario only. Run every variant with "
                    f"`fieldplan compare {sc.source or '<file>'}`.")


def _prepare_out(args, out, inputs):
    """Refuse an output folder that may not be written, before any work; clear stale temporary folders."""

    check_output_folder(out, args.force, inputs)
    for p in clean_stale_temps(out):
        say(args, f"note: removed {os.path.basename(p)}, a temporary folder left by an earlier run that was "
                   "killed while writing.", err=True)


def _inputs(paths, scenarios=()):
    """Files a run reads: the given paths and the files its scenarios name (calibrations)."""
    out = [p for p in paths if p]
    for sc in scenarios:
        out += list(getattr(sc, "input_files", ()) or ())
    return out


def _default_out(sc, suffix):
    base = os.path.splitext(os.path.basename(sc.source or sc.name))[0]
    return f"{base}-{suffix}"


# ---------------------------------------------------------------------------------------------
def _cmd_run(args):
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .workflows.compare import run_scenario  # noqa: PLC0415

    sc = load_for_command(args.scenario, args)
    _note_variants(args, sc, "run", "plans and simulates")
    out = args.out or _default_out(sc, "output")
    inputs = _inputs([args.scenario, args.schedule], [sc])
    _prepare_out(args, out, inputs)
    schedule = None
    if args.schedule:
        schedule = _read_schedule(args.schedule, sc)
    t0 = time.perf_counter()
    if sc.mode == "open_loop" and schedule is None:
        say(args, f"planning {sc.name}: {len(sc.bodies)} bodies, {type(sc.actuator).__name__} with "
                   f"{len(sc.actuator.channels)} channels ...")
    try:
        run = run_scenario(sc, schedule=schedule, trials=args.trials, seed=args.seed, progress=show_progress(args))
    except LimitError as exc:
        what = "the given schedule" if schedule is not None else "the planned schedule"
        raise UserError(f"refusing to export {what}: {exc} Nothing was written.") from None
    outputs = sc.outputs
    if args.no_plots:
        import dataclasses  # noqa: PLC0415

        outputs = dataclasses.replace(outputs, plots=(), animation=False)
    try:
        files = write_outputs(out, run, force=args.force, outputs=outputs, inputs=inputs)
    except LimitError as exc:
        raise UserError(f"refusing to export the schedule: {exc} Nothing was written.") from None
    agg = run.aggregate()
    say(args, f"{sc.name}: {run.message} ({time.perf_counter() - t0:.1f} s)")
    if run.trials:
        say(args, f"  success rate {100 * agg['success_rate']:.0f} %, mean final error "
                   f"{format_quantity(agg['final_error'], 'm')}, min separation "
                   f"{format_quantity(agg['min_separation'], 'm')}")
    if run.schedule is not None:
        say(args, f"  schedule: {run.schedule.n_segments} segments, {format_quantity(run.schedule.duration, 's', 4)}, checked "
                   "against the declared limits")
    say(args, f"outputs in {os.path.abspath(out)}:")
    for role, path in sorted(files.items(), key=lambda kv: os.path.basename(kv[1])):
        say(args, f"  {os.path.basename(path)}")
    return run.exit_code


def _read_schedule(path, sc):
    if not os.path.exists(path):
        raise UserError(f"{path}: no such schedule file.")
    if not os.path.isfile(path):
        raise UserError(f"{path}: not a regular file (a folder, device or pipe cannot be a schedule).")
    try:
        if path.lower().endswith(".json"):
            return Schedule.read_json(path)
        return Schedule.read_csv(path, sc.actuator.channels)
    except FieldplanError as exc:
        raise UserError(f"{path}: {exc}") from None
    except (ValueError, KeyError, IndexError, json.JSONDecodeError) as exc:
        raise UserError(f"{path}: cannot read the schedule ({type(exc).__name__}: {exc}).") from None


# ---------------------------------------------------------------------------------------------
def _parse_seeds(text):
    text = str(text).strip()
    try:
        if "," in text:
            seeds = [int(s) for s in text.split(",") if s.strip()]
        else:
            n = int(text)
            if n > MAX_SEEDS:           # before building the list
                raise UserError(f"--seeds: at most {MAX_SEEDS} seeds, got {n}.")
            seeds = list(range(n))
    except ValueError:
        raise UserError(f"--seeds: expected a count or a comma list of whole numbers, got {text!r}.") from None
    if len(seeds) > MAX_SEEDS:
        raise UserError(f"--seeds: at most {MAX_SEEDS} seeds, got {len(seeds)}.")
    if not seeds or any(s < 0 for s in seeds):
        raise UserError(f"--seeds: need at least one seed >= 0, got {text!r}.")
    return seeds


def _cmd_compare(args):
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .workflows.compare import compare, make_executor, write_comparison  # noqa: PLC0415

    seeds = _parse_seeds(args.seeds)
    loaded, problems = _load_each(args.scenarios, args)
    if problems:
        raise ScenarioError(problems)
    scenarios = [v for _, sc in loaded for v in (sc.variants or [sc])]
    names = [s.name for s in scenarios]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise UserError(f"two scenarios or variants share the label(s) {dup}; give each file a distinct 'name'.")
    inputs = _inputs(args.scenarios, [sc for _, sc in loaded])
    _prepare_out(args, args.out, inputs)
    n_tasks = len(scenarios) * len(seeds)
    workers = args.workers if args.workers is not None else min(os.cpu_count() or 1, n_tasks)
    say(args, f"comparing {len(scenarios)} variant(s) x {len(seeds)} seed(s), {args.trials} trial(s) each"
               + (f" on {args.scheduler}" if args.scheduler else f" with {workers} worker(s)") + " ...")
    with make_executor(args.scheduler, workers) as ex:
        cmp = compare(scenarios, seeds=seeds, trials=args.trials, executor=ex, progress=show_progress(args))
    out = os.path.abspath(args.out)
    write_comparison(out, cmp, seeds=seeds, trials=args.trials, force=args.force, inputs=inputs)
    say(args, cmp.to_markdown())
    for r in cmp.rows:
        for m in r["error_messages"][:1]:
            _warn(args, f"variant {r['label']}: {len(r['error_messages'])} run(s) failed: {m}")
    say(args, f"outputs in {out}:", "  comparison.md", "  comparison.csv", "  comparison.json", "  comparison.png")
    # The comparison is the result: it succeeded when it produced numbers, whatever each variant's
    # success (a comparison whose failing variant is the point must not fail the command; the table
    # marks each variant below its required rate). Exit 1 only when no run produced anything.
    produced = any(r["runs"] > r["errors"] for r in cmp.rows)
    return EXIT_OK if produced else EXIT_NOT_REACHED


# ---------------------------------------------------------------------------------------------
def _cmd_inspect(args):
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .scenario import MAX_BODIES  # noqa: PLC0415
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .workflows.inspect import inspect_scenario  # noqa: PLC0415

    sc = load_for_command(args.scenario, args)
    _note_variants(args, sc, "inspect", "inspects")
    out = os.path.abspath(args.out or _default_out(sc, "inspect"))
    inputs = _inputs([args.scenario], [sc])
    _prepare_out(args, out, inputs)
    counts = None
    if args.counts:
        try:
            counts = [int(x) for x in args.counts.split(",") if x.strip()]
        except ValueError:
            raise UserError(f"--counts: expected a comma list of whole numbers, got {args.counts!r}.") from None
        if not counts or min(counts) < 1 or max(counts) > MAX_BODIES:
            raise UserError(f"--counts: counts must be from 1 to {MAX_BODIES}, got {args.counts!r}.")
    lines, _ = inspect_scenario(sc, out, force=args.force, inputs=inputs, counts=counts, grid=args.grid,
                                trials=args.trials, progress=show_progress(args))
    say(args, *lines)
    say(args, f"outputs in {out}:", *(f"  {n}" for n in sorted(os.listdir(out)) if not n.startswith(".")))
    return EXIT_OK


def _load_each(paths, args, check_only=False):
    """Load every scenario file; returns ``[(path, scenario)]`` and all problems of the bad ones."""
    loaded, problems = [], []
    for path in paths:
        try:
            loaded.append((path, load_for_command(path, args, check_only=check_only)))
        except ScenarioError as exc:
            problems.extend(exc.problems)
    return loaded, problems


# ---------------------------------------------------------------------------------------------
def _cmd_validate(args):
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .scenario import dump_scenario  # noqa: PLC0415

    loaded, problems = _load_each(args.scenarios, args, check_only=True)
    for path, sc in loaded:
        if args.normalised:
            print(f"# {path} (normalised, SI units)")
            print(dump_scenario(sc))
            for v in sc.variants:
                print(f"# {path}: variant {v.name}")
                print(dump_scenario(v))
        else:
            nb = len(sc.bodies)
            if sc.actuator is None:
                what = (f"actuator {sc.config['actuator']['type']} not checked (validate does not import "
                        "modules that are not registered plug-ins)")
            else:
                nc = len(sc.actuator.channels)
                what = f"{type(sc.actuator).__name__} with {nc} channel{'' if nc == 1 else 's'}"
            say(args, f"{path}: ok - {nb} bod{'y' if nb == 1 else 'ies'}, {what}"
                       + (f", {len(sc.variants)} variants" if sc.variants else ""))
    if problems:
        raise ScenarioError(problems)
    return EXIT_OK


def _cmd_fit(args):
    try:
        # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
        from .calibration.calibrate import calibrate_command  # noqa: PLC0415
    except ImportError as exc:
        raise UserError(f"calibration is not available ({exc}).") from None

    if not os.path.exists(args.tracks):
        raise UserError(f"{args.tracks}: no such tracking file.")
    if not os.path.isfile(args.tracks):
        raise UserError(f"{args.tracks}: not a regular file (a folder, device or pipe is not a tracking CSV).")
    _prepare_out(args, args.out, [args.tracks])
    units = None
    if args.units:
        units = {}
        for item in args.units.split(","):
            if "=" not in item:
                raise UserError(f"--units: expected col=unit pairs, got {item!r}.")
            k, u = item.split("=", 1)
            units[k.strip()] = u.strip()
    prims = [p.strip() for p in args.primitives.split(",")] if args.primitives else None
    note = args.note if args.note is not None else _previous_note(os.path.join(args.out, f"{args.name}.json"))
    if args.note is None and note:
        say(args, f"keeping the note of the actuator being replaced: {note!r} (change it with --note)")
    out = os.path.abspath(args.out)
    with output_folder(out, args.force, [args.tracks], command="fit") as tmp:
        rep = calibrate_command(args.tracks, tmp, primitives=prims, units=units, idle=args.idle, name=args.name,
                                plots=not args.no_plots, warn=False, note=note, skip_bad_rows=args.skip_bad_rows,
                                report_dir=out)
    if rep.get("skipped_rows"):
        sk = rep["skipped_rows"]
        # Not a warning that -q silences: the user asked for rows to be dropped and must see which.
        say(args, f"warning: skipped {len(sk)} bad row(s) of {args.tracks} (--skip-bad-rows): "
                   + "; ".join(sk[:5]) + (f"; ... ({len(sk) - 5} more in the report)" if len(sk) > 5 else ""),
             err=True)
    for w in rep.get("warnings", []):
        _warn(args, w)
    for row in rep.get("fields", [])[:40]:
        cv, rel = row.get("cv_rmse_m_per_s"), row.get("cv_relative")
        say(args, f"  {row.get('kind', '?')} / {row.get('primitive', '?')}: {row.get('n_samples', '?')} samples, "
                   f"cross-validated error {format_quantity(cv, 'm/s')}"
                   + (f" ({100 * rel:.0f} % of the RMS speed)" if isinstance(rel, float) else ""))
    say(args, f"calibrated actuator: {rep['actuator']}", f"report: {rep['report']}",
         *[f"plot: {p}" for p in (rep.get("plots") or {}).values()],
         f"use it in a scenario as: actuator: {{type: calibrated, path: {rep['actuator']}}}")
    return EXIT_OK


def _previous_note(path):
    """The ``note`` of an existing calibrated-actuator JSON (None if absent or unreadable)."""
    try:
        with open(path, encoding="utf-8") as fh:
            note = json.load(fh).get("note")
    except (OSError, ValueError, AttributeError):
        return None
    return note if isinstance(note, str) and note else None


def _cmd_schema(args):
    # deferred import: start-up time of the CLI: `fieldplan --help` does not load this layer
    from .scenario import actuator_params, schema_reference  # noqa: PLC0415

    if not args.actuators_only:
        print(schema_reference())
    print("### Registered actuators\n")
    for name, target in sorted(available_actuators().items()):
        try:
            cls = load_actuator_class(name)
            params = actuator_params(cls)
            desc = ", ".join(f"{n}" + (f" [{u}]" if u else "") for n, (_, u) in params.items())
        except FieldplanError as exc:
            desc = f"(cannot load: {exc})"
        print(f"- `{name}` ({target}): {desc}")
    return EXIT_OK


_COMMANDS = {"run": _cmd_run, "compare": _cmd_compare, "inspect": _cmd_inspect, "validate": _cmd_validate,
             "fit": _cmd_fit, "schema": _cmd_schema}


# ---------------------------------------------------------------------------------------------
# the lab commands: `track` and `play` live in fieldplan/lab/commands.py
# ---------------------------------------------------------------------------------------------
def _cmd_track(args):
    return cmd_track(args)


def _cmd_play(args):
    return cmd_play(args)


def _cmd_design(args):
    return design_command(args)


_COMMANDS.update(track=_cmd_track, play=_cmd_play, design=_cmd_design)


class _Terminated(KeyboardInterrupt):
    """SIGTERM (or SIGHUP) arrived: unwind like Ctrl-C, so temporary output is removed on the way out."""

    def __init__(self, signum):
        super().__init__(signum)
        self.signum = signum


def _on_signal(signum, frame):
    raise _Terminated(signum)


def main(argv=None):
    """Entry point of the ``fieldplan`` console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return EXIT_BAD_INPUT
    import signal  # noqa: PLC0415
    import threading  # noqa: PLC0415
    import warnings  # noqa: PLC0415

    previous = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, getattr(signal, "SIGHUP", None)):
            if sig is not None:
                previous[sig] = signal.signal(sig, _on_signal)
    try:
        with warnings.catch_warnings():
            if getattr(args, "quiet", False):
                warnings.simplefilter("ignore")
            else:
                warnings.showwarning = _show_warning
            return _dispatch(args)
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def _show_warning(message, category, filename, lineno, file=None, line=None):
    print(f"warning: {category.__name__}: {message}", file=sys.stderr, flush=True)


def _dispatch(args):
    try:
        return _COMMANDS[args.command](args)
    except ScenarioError as exc:
        n = len(exc.problems)
        print(f"fieldplan: {n} problem{'s' if n != 1 else ''} found:", file=sys.stderr)
        for p in exc.problems:
            print("  " + ScenarioError.format_problem(*p), file=sys.stderr)
        return EXIT_BAD_INPUT
    except (FieldplanError, UserError) as exc:
        print(f"fieldplan: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except _Terminated as exc:
        import signal  # noqa: PLC0415

        print(f"fieldplan: terminated ({signal.Signals(exc.signum).name}); unfinished output was removed.",
              file=sys.stderr)
        return 128 + exc.signum
    except KeyboardInterrupt:
        print("fieldplan: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
    except OSError as exc:
        print(f"fieldplan: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception:  # noqa: BLE001 - a bug: show it in full, with its own exit code
        import traceback  # noqa: PLC0415

        traceback.print_exc()
        what = {"fit": "the tracking file", "schema": "the command line"}.get(args.command, "the scenario file")
        print(f"fieldplan: internal error (this is a bug; please report it with {what} and the command line).",
              file=sys.stderr)
        return EXIT_INTERNAL


def _entry():  # pragma: no cover - console-script shim
    sys.exit(main())


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
