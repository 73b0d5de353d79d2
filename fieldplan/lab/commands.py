"""The ``fieldplan track`` and ``fieldplan play`` sub-commands (registered by :mod:`fieldplan.cli`).

Kept here, beside the lab stack they drive, so that :mod:`fieldplan.cli` only registers them; the
third-party libraries are imported when a command runs, never when the parser is built.
"""

from __future__ import annotations

import os

from ..errors import LimitError
from ..units import to_si
from ..world.simulate import Simulator
from . import LabDependencyError

__all__ = ["add_commands", "cmd_track", "cmd_play"]


def add_commands(add, nonneg_int):
    """Register ``track`` and ``play`` with the ``fieldplan`` parser (``add(name, help, description, example)``
    as in :func:`fieldplan.cli.build_parser`); their handlers are :func:`cmd_track` and :func:`cmd_play`."""
    t = add("track", "microscope video (or a trackpy table) -> tracking CSV for `fit` (needs fieldplan[lab])",
            """
            Read the frames (TIFF stacks, video files), locate and link the bodies with trackpy
            (defaults from the body radius and pixel size), map pixels to workspace coordinates
            (pixel size, reference marks or an affine matrix), join the input log (which primitive
            or channel values were on at each frame time) and write the tracking CSV that
            `fieldplan fit` reads. Lost tracks, identity swaps and dropped frames are reported per
            track. VIDEO may also be a trackpy results table (.csv, .h5) with frame, x, y, particle.
            """,
            """
            fieldplan track dish3.tif --px "0.65 um" --fps 50 --settings log.csv --radius "1 um" --out tracks.csv
            fieldplan track dish3.avi --marks marks.csv --fps 25 --settings sent.csv --radius "2 um" --out t.csv --fit calib
            fieldplan track features.csv --affine 6.5e-7,0,-1e-4,0,6.5e-7,-2e-4 --fps 50 --settings log.csv --out t.csv
            """)
    t.add_argument("video", help="TIFF stack, video file, or trackpy table (.csv/.h5)")
    t.add_argument("--settings", required=True, metavar="LOG", help="input log CSV (time [s], primitive and/or "
                   "channel columns; a driver's --log or a schedule CSV)")
    t.add_argument("--out", "-o", required=True, help="tracking CSV to write")
    t.add_argument("--force", action="store_true", help="replace an existing output file")
    t.add_argument("--fps", default=None, help="frame rate, e.g. 50 or '50 Hz'")
    t.add_argument("--px", default=None, metavar="SIZE", help="pixel size in the sample plane, e.g. '0.65 um'")
    t.add_argument("--rotation", type=float, default=0.0, help="angle of the image x axis in the workspace, degrees")
    t.add_argument("--offset", default=None, metavar="X,Y", help="workspace position of pixel (0, 0), e.g. '10 um,5 um'")
    t.add_argument("--flip-y", action="store_true", help="mirror image rows (workspace y up)")
    t.add_argument("--marks", default=None, metavar="CSV", help="reference marks: x_px,y_px,x [um],y [um]")
    t.add_argument("--affine", default=None, metavar="A", help="2x3 matrix, m/px and m, six numbers row-wise")
    t.add_argument("--radius", default=None, help="body radius, e.g. '1 um' (trackpy defaults follow from it)")
    t.add_argument("--diameter", type=float, default=None, help="trackpy feature diameter, px (odd)")
    t.add_argument("--minmass", type=float, default=None, help="trackpy minimum integrated brightness")
    t.add_argument("--search-range", type=float, default=None, help="largest step between frames, px")
    t.add_argument("--memory", type=nonneg_int, default=3, help="frames a body may vanish (default 3)")
    t.add_argument("--count", type=nonneg_int, default=None, help="bodies expected in view (sharpens minmass)")
    t.add_argument("--min-length", type=nonneg_int, default=5, help="shortest track kept, frames (default 5)")
    t.add_argument("--log-offset", type=float, default=0.0, help="video clock minus log clock, s")
    t.add_argument("--kind", default=None, help="body kind written in every row (a scenario body name)")
    t.add_argument("--fit", default=None, metavar="DIR", help="also fit a calibrated actuator into DIR")
    t.add_argument("--quiet", "-q", action="store_true", help="print errors only")

    pl = add("play", "play a saved schedule on an instrument (VISA, serial, NI-DAQmx; needs fieldplan[lab])",
             """
             Check the schedule against its declared limits, show them and ask for confirmation, then
             send each segment when it is due. Every segment is checked again before it is sent; at
             the end, on Ctrl-C and on any error the instrument is set to the idle input (output off).
             Commands come from an instrument profile (YAML: command templates per channel, output
             on/off, acknowledgement, error query); --dry-run sends nothing and, with --scenario,
             plays the schedule on the simulated truth at real speed. Switch the instrument output off
             before connecting and keep interlocks closed.
             """,
             """
             fieldplan play run/schedule.json --driver visa://TCPIP::10.0.0.7::INSTR --profile tonegen.yaml
             fieldplan play run/schedule.json --driver serial:///dev/ttyACM0 --profile coils.yaml --log sent.csv
             fieldplan play run/schedule.csv --scenario dish.yaml --driver daq://Dev1/ao0,Dev1/ao1 --scale 2 --yes
             fieldplan play run/schedule.json --driver visa://ASRL1::INSTR --profile tonegen.yaml --dry-run
             """)
    pl.add_argument("schedule", help="schedule.json (with its limits) or schedule.csv (needs --scenario)")
    pl.add_argument("--driver", required=True, metavar="URL", help="visa://RESOURCE[@backend], serial://PORT, "
                    "daq://Dev1/ao0,...")
    pl.add_argument("--profile", default=None, metavar="YAML", help="instrument profile (visa and serial)")
    pl.add_argument("--limits", default=None, metavar="FILE", help="limits (JSON/YAML) instead of the file's")
    pl.add_argument("--scenario", default=None, help="scenario: channels and limits; the truth for --dry-run")
    pl.add_argument("--dry-run", action="store_true", help="send nothing: format, log and pace only")
    pl.add_argument("--speed", type=float, default=1.0, help="with --dry-run: play this many times faster")
    pl.add_argument("--yes", "-y", action="store_true", help="do not ask for confirmation (scripts)")
    pl.add_argument("--log", default=None, metavar="CSV", help="write what was sent, with times (an input log)")
    pl.add_argument("--rate", type=float, default=None, help="daq: samples per second (default 10000)")
    pl.add_argument("--scale", default=None, help="daq: volts per channel unit, one number or a comma list")
    pl.add_argument("--quiet", "-q", action="store_true", help="print errors only")


def cmd_track(args):
    """``fieldplan track``: returns the exit code; bad input raises the command's user error (exit 2)."""
    # deferred import: import cycle: fieldplan.cli imports this module to build its parser (cli is the layer above)
    from ..cli import EXIT_OK, say, show_progress, UserError  # noqa: PLC0415
    # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
    from .pixels import PixelMap, read_marks  # noqa: PLC0415

    if os.path.exists(args.out) and not args.force:
        raise UserError(f"{args.out} exists; pass --force to replace it.")
    if not os.path.exists(args.video):
        raise UserError(f"{args.video}: no such file.")
    for name in ("video", "settings", "marks"):
        src = getattr(args, name)
        if src and os.path.exists(src) and os.path.exists(args.out) and os.path.samefile(src, args.out):
            raise UserError(f"--out {args.out} is the {name} file; choose another name (inputs are never replaced).")
    given = [k for k in ("px", "marks", "affine") if getattr(args, k)]
    if len(given) > 1:
        raise UserError(f"give one pixel map, not {' and '.join('--' + k for k in given)}: --px (with --rotation, "
                         "--offset, --flip-y), --marks or --affine.")
    if args.marks:
        pm = PixelMap.from_marks(*read_marks(args.marks))
    elif args.affine:
        pm = PixelMap.from_matrix(args.affine)
    elif args.px:
        off = (0.0, 0.0)
        if args.offset:
            parts = [p.strip() for p in args.offset.split(",")]
            if len(parts) != 2:
                raise UserError(f"--offset: expected 'x,y' with units, got {args.offset!r}.")
            off = tuple(to_si(p, "m", name="--offset") for p in parts)
        import math  # noqa: PLC0415

        pm = PixelMap.from_scale(args.px, rotation=math.radians(args.rotation), offset=off, flip_y=args.flip_y)
    else:
        raise UserError("give the pixel size (--px '0.65 um'), reference marks (--marks) or --affine.")
    # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
    from .inputlog import read_input_log  # noqa: PLC0415

    fps = args.fps
    if fps is not None:
        try:
            fps = float(fps)                 # a plain number is in Hz
        except ValueError:
            pass
    log = read_input_log(args.settings)
    if args.log_offset:
        log = log.shifted(args.log_offset)
    try:
        # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
        from .video import TABLE_SUFFIXES, track_video, tracks_from_table  # noqa: PLC0415

        if args.video.lower().endswith(TABLE_SUFFIXES):
            res = tracks_from_table(args.video, settings=log, fps=fps, pixel_map=pm, min_length=args.min_length,
                                    kind=args.kind, out=args.out, warn=False)
        else:
            res = track_video(args.video, settings=log, fps=fps, pixel_map=pm, radius=args.radius,
                              diameter=args.diameter, minmass=args.minmass, search_range=args.search_range,
                              memory=args.memory, count=args.count, min_length=args.min_length, kind=args.kind,
                              out=args.out, progress=show_progress(args), warn=False)
    except LabDependencyError as exc:
        raise UserError(str(exc)) from None
    sm = res.summary()
    say(args, f"{args.video}: {sm['frames']} frames, {sm['tracks']} tracks ({pm.describe()})")
    for r in res.report:
        notes = [f"{k} {r[k]}" for k in ("frames_missing", "gaps", "swaps", "outliers", "unlogged") if r[k]]
        say(args, f"  {r['track']}: frames {r['first_frame']}-{r['last_frame']}, seen in {r['frames_seen']}"
                   + (", lost before the end" if r["lost"] else "") + ("; " + ", ".join(notes) if notes else ""))
    stubs = sum(1 for i in res.issues if i.kind == "stub")
    if stubs:
        say(args, f"  {stubs} track(s) shorter than {args.min_length} frames dropped")
    say(args, f"tracking CSV: {args.out}")
    if args.fit:
        # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
        from ..workflows.fit import calibrate_command  # noqa: PLC0415

        if os.path.exists(args.fit) and not args.force:
            raise UserError(f"output folder {args.fit!r} already exists; pass --force to write into it.")
        rep = calibrate_command(args.out, args.fit, plots=not args.quiet, warn=False)
        say(args, f"calibrated actuator: {rep['actuator']}")
    return EXIT_OK


def cmd_play(args):
    """``fieldplan play``: returns the exit code (130 when interrupted; the instrument is then idle)."""
    import numpy as np  # noqa: PLC0415

    # deferred import: import cycle: fieldplan.cli imports this module to build its parser (cli is the layer above)
    from ..cli import EXIT_OK, load_for_command, say, UserError  # noqa: PLC0415
    # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
    from .drivers import open_driver  # noqa: PLC0415
    # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
    from .pacing import RealTimeClock  # noqa: PLC0415
    # deferred import: start-up time of the CLI: `fieldplan --help` imports this module
    from .play import limits_text, load_for_play, play  # noqa: PLC0415

    if args.log and os.path.exists(args.log):
        for name in ("schedule", "profile", "limits", "scenario"):
            src = getattr(args, name)
            if src and os.path.exists(src) and os.path.samefile(src, args.log):
                raise UserError(f"--log {args.log} is the {name} file; choose another name (inputs are never replaced).")
    sc = load_for_command(args.scenario, args) if args.scenario else None
    if args.speed != 1.0 and not args.dry_run:
        raise UserError("--speed is for --dry-run only: a real instrument plays in real time.")
    if not args.speed > 0:
        raise UserError(f"--speed must be > 0, got {args.speed}.")
    limits = args.limits if args.limits else (sc.limits if sc is not None else None)
    schedule, lim = load_for_play(args.schedule, limits=limits, channels=sc.actuator.channels if sc else None)
    scale = None
    if args.scale:
        try:
            scale = [float(x) for x in args.scale.split(",")]
        except ValueError:
            raise UserError(f"--scale: expected numbers, got {args.scale!r}.") from None
    try:
        schedule.check(lim)
        driver = open_driver(args.driver, schedule.channels, lim, profile=args.profile, log=args.log,
                             dry_run=args.dry_run, rate=args.rate, scale=scale)
    except LimitError as exc:
        raise UserError(f"refusing to play {args.schedule}: {exc} Nothing was sent.") from None
    except LabDependencyError as exc:
        raise UserError(str(exc)) from None
    caution = ("Before you go on: instrument output OFF while connecting, interlocks closed, nobody in reach "
               "of the set-up.")
    head = ["DRY RUN: nothing is sent to any instrument."] if args.dry_run else [caution]
    lines = head + [f"driver: {args.driver} ({driver.describe()})"] + limits_text(schedule, lim)
    if not args.yes:
        print(*lines, sep="\n", flush=True)
        try:
            answer = input("type 'yes' to play: ")
        except EOFError:
            answer = ""
        if answer.strip().lower() != "yes":
            raise UserError("not confirmed; nothing was sent (pass --yes to skip the prompt in scripts).")
    else:
        say(args, *lines)
    on_segment = None
    sim = None
    if args.dry_run and sc is not None:
        sim = Simulator(sc.truth or sc.actuator, sc.bodies, sc.workspace, sc.starts, rng=sc.simulation.seed)

        def on_segment(j, seg):
            sim.apply(seg)
    say(args, f"playing {schedule.duration:.4g} s; Ctrl-C stops and sets the instrument to the idle input")
    rep = play(schedule, driver, limits=lim, clock=RealTimeClock(speed=args.speed), on_segment=on_segment)
    lat = rep.latency
    say(args, rep.message, f"timing: latency median {1e3 * float(np.median(lat)) if len(lat) else 0:.2f} ms, max "
                            f"{1e3 * float(np.max(lat)) if len(lat) else 0:.2f} ms, jitter {1e3 * rep.jitter:.2f} ms, "
                            f"{len(rep.overruns)} overrun(s)")
    if sim is not None:
        err = np.linalg.norm(sim.positions - sc.goals, axis=1)
        say(args, "simulated truth at the end: " + ", ".join(f"body {i} {e * 1e6:.3g} um from its goal"
                                                               for i, e in enumerate(err)))
    if rep.log:
        say(args, f"log: {rep.log}")
    if rep.interrupted:
        # Ctrl-C: 130; a terminating signal the command turned into an interrupt: 128 + its number.
        return 128 + rep.signal if rep.signal else 130
    return EXIT_OK
