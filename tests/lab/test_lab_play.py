"""``fieldplan play`` and ``fieldplan track``, and fieldplan.lab.play, on real back ends.

The instrument is the pyvisa-sim tone generator of tests/lab/test_lab_drivers.py (an invented
instrument); an interrupted play (a real SIGINT to a real ``fieldplan play`` process, and a
KeyboardInterrupt in-process) must leave it at the idle input.
"""

from __future__ import annotations

import os
import pathlib
import signal
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest

pyvisa = pytest.importorskip("pyvisa")
pytest.importorskip("pyvisa_sim")

from test_lab_drivers import CHANNELS, DEVICE_YAML, PROFILE_YAML  # noqa: E402

from fieldplan import ChannelLimit, HardwareLimits, Schedule, Segment  # noqa: E402
from fieldplan.cli import main  # noqa: E402
from fieldplan.lab.drivers import open_driver  # noqa: E402
from fieldplan.lab.inputlog import read_input_log  # noqa: E402
from fieldplan.lab.pacing import OverrunWarning, RealTimeClock  # noqa: E402
from fieldplan.lab.play import play  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parents[2]
LIMITS = HardwareLimits({"tone_amp": ChannelLimit(upper=8.0)})


@pytest.fixture
def rig(tmp_path):
    dev = tmp_path / "tonegen.yaml"
    dev.write_text(DEVICE_YAML)
    prof = tmp_path / "profile.yaml"
    prof.write_text(PROFILE_YAML)
    backend = f"{dev}@sim"
    # A second client on the bench, open for the whole test: pyvisa-sim keeps a device's state only
    # while some resource manager on its definition is open.
    rm = pyvisa.ResourceManager(backend)

    def state():
        inst = rm.open_resource("ASRL1::INSTR", write_termination="\n", read_termination="\n")
        out = {"amp": float(inst.query("VOLT?")), "out": int(inst.query("OUTP?"))}
        inst.close()
        return out

    yield {"url": f"visa://ASRL1::INSTR@{backend}", "profile": str(prof), "state": state, "dir": tmp_path}
    rm.close()


def schedule(n=6, duration=0.05, amp=2.0):
    segs = [Segment(j * duration, duration, [1000.0 + 500 * (j % 8), amp * (j % 2 + 1) / 2], f"tone{j % 2}")
            for j in range(n)]
    return Schedule.from_segments(CHANNELS, segs)


def test_interrupted_play_leaves_the_instrument_idle(rig):
    drv = open_driver(rig["url"], CHANNELS, LIMITS, profile=rig["profile"])

    def stop_after_two(j, seg):
        assert rig["state"]() == {"amp": seg.values[1], "out": 1}         # playing: output on
        if j == 2:
            raise KeyboardInterrupt

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OverrunWarning)     # the state queries above take their time
        rep = play(schedule(), drv, clock=RealTimeClock(speed=20.0), on_segment=stop_after_two)
    assert rep.interrupted and not rep.completed and rep.segments_sent == 3
    assert rig["state"]() == {"amp": 0.0, "out": 0}
    assert "idle" in rep.message


def test_play_command_end_to_end_with_log_and_confirmation(rig, monkeypatch, capsys):
    sched = rig["dir"] / "schedule.json"
    schedule().write_json(sched, limits=LIMITS)
    log = rig["dir"] / "sent.csv"
    # a "no" at the prompt: nothing is sent (the instrument keeps its power-on state)
    monkeypatch.setattr("sys.stdin", __import__("io").StringIO("no\n"))
    assert main(["play", str(sched), "--driver", rig["url"], "--profile", rig["profile"]]) == 2
    shown = capsys.readouterr()
    assert "tone_amp: allowed [0, 8] V" in shown.out and "interlocks closed" in shown.out
    assert "not confirmed" in shown.err and rig["state"]() == {"amp": 3.0, "out": 1}
    assert main(["play", str(sched), "--driver", rig["url"], "--profile", rig["profile"], "--yes",
                 "--log", str(log), "--quiet"]) == 0
    assert rig["state"]() == {"amp": 0.0, "out": 0}
    sent = read_input_log(log)
    assert sent.primitive.count("tone0") == 3 and sent.primitive[-1] == "idle"


def test_play_refuses_a_schedule_over_the_limits(rig, capsys):
    sched = rig["dir"] / "schedule.json"
    schedule(amp=10.0).write_json(sched)                                   # 10 V: over the 8 V declared below
    lim = rig["dir"] / "limits.yaml"
    lim.write_text("channels:\n  tone_amp: {upper: 8.0}\n")
    code = main(["play", str(sched), "--driver", rig["url"], "--profile", rig["profile"], "--limits", str(lim),
                 "--yes"])
    assert code == 2
    assert "refusing to play" in capsys.readouterr().err and rig["state"]() == {"amp": 3.0, "out": 1}
    assert main(["play", str(sched), "--driver", rig["url"], "--profile", rig["profile"], "--yes",
                 "--log", str(sched)]) == 2                                 # the log never replaces an input
    assert "inputs are never replaced" in capsys.readouterr().err


def test_play_dry_run_against_the_scenario_simulator(tmp_path, capsys):
    from fieldplan.scenario import load_scenario

    sc = load_scenario(ROOT / "scenarios" / "demo.yaml")
    m = len(sc.actuator.channels)
    segs = [Segment(0.0, 0.5, np.eye(m)[0] * 0.15, "a"),         # within the demo's slew limit
            Segment(0.5, 0.5, np.zeros(m), "idle")]
    path = tmp_path / "schedule.csv"
    Schedule.from_segments(sc.actuator.channels, segs).write_csv(path)
    url = "daq://" + ",".join(f"Dev1/ao{k}" for k in range(m))
    code = main(["play", str(path), "--scenario", str(ROOT / "scenarios" / "demo.yaml"), "--driver", url,
                 "--dry-run", "--speed", "50", "--yes", "--log", str(tmp_path / "dry.csv")])
    out = capsys.readouterr().out
    assert code == 0, out
    assert "DRY RUN" in out and "simulated truth at the end" in out
    assert read_input_log(tmp_path / "dry.csv").primitive[:2] == ["idle", "a"]
    assert main(["play", str(path), "--driver", url, "--speed", "5", "--yes"]) == 2     # --speed: dry runs only


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")
@pytest.mark.parametrize("sig", ["SIGINT", "SIGTERM"])
def test_a_signal_to_a_running_play_leaves_the_instrument_idle(rig, sig):
    """A real Ctrl-C (SIGINT) or SIGTERM to `fieldplan play`: exit 128 + the signal number, and the log
    ends with the idle commands."""
    sched = rig["dir"] / "schedule.json"
    schedule(n=40, duration=0.1).write_json(sched, limits=LIMITS)          # 4 s
    log = rig["dir"] / "sent.csv"
    # Unbuffered: the "playing" line must reach us while it plays, not when it exits (a buffered pipe
    # let the whole play finish before the signal was sent, on a loaded machine).
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""), PYTHONUNBUFFERED="1")
    # The child starts with Python's own Ctrl-C handler, as in a terminal: run from a background job
    # (nohup, `&` in a script) it would inherit an ignored SIGINT, and rightly keep playing.
    code = ("import signal, sys; signal.signal(signal.SIGINT, signal.default_int_handler); "
            "from fieldplan.cli import main; sys.exit(main())")
    proc = subprocess.Popen([sys.executable, "-c", code,
                             "play", str(sched), "--driver", rig["url"], "--profile", rig["profile"], "--yes",
                             "--log", str(log)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        for line in proc.stdout:                                            # the limits are shown, then it plays
            if line.startswith("playing"):
                break
        time.sleep(0.8)
        proc.send_signal(getattr(signal, sig))
        _, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 128 + getattr(signal, sig), err
    rows = read_input_log(log)
    assert 2 < len(rows.times) < 42, err                                    # stopped part-way
    assert rows.primitive[-1] == "idle" and rows.values[-1][1] == 0.0, err
    text = log.read_text().splitlines()[-1]
    assert "OUTP 0" in text


def test_track_command_writes_the_csv_fit_reads(tmp_path, capsys):
    pytest.importorskip("trackpy")
    tifffile = pytest.importorskip("tifffile")
    from _lab_frames import render_stack
    from test_lab_video import crossing_paths, write_log

    from fieldplan.calibration.tracking import read_tracks

    stack = render_stack((80, 96), crossing_paths(), rng=1)
    video = tmp_path / "v.tif"
    tifffile.imwrite(video, np.clip(stack, 0, 65535).astype(np.uint16))
    log = write_log(tmp_path / "log.csv", [(0.0, "push", 1.0), (1.0, "idle", 0.0)])
    out = tmp_path / "tracks.csv"
    args = ["track", str(video), "--px", "0.5 um", "--fps", "20", "--settings", str(log), "--radius", "1 um",
            "--search-range", "5", "--out", str(out)]
    assert main(args) == 0
    said = capsys.readouterr().out
    assert "40 frames, 2 tracks" in said and "p0: frames 0-39, seen in 40" in said
    assert set(read_tracks(out, warn=False).primitives) == {"push", "idle"}
    assert main(args) == 2                                                  # exists: needs --force
    assert "--force" in capsys.readouterr().err
    assert main(args[:-2] + ["--marks", str(log), "--out", str(tmp_path / "x.csv")]) == 2   # two pixel maps
    assert main(args[:-2] + ["--out", str(log), "--force"]) == 2                           # never over an input
    assert "inputs are never replaced" in capsys.readouterr().err and log.read_text().startswith("time [s]")
