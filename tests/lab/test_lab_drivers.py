"""fieldplan.lab.drivers on real back ends: a pyvisa-sim instrument, pyserial's loop:// port, DAQ arrays.

The simulated tone generator's YAML definition is below (an invented instrument: its command set is
ours, chosen to differ from any vendor's). pyvisa-sim answers a setter outside its specs with
"ERROR", which the drivers must catch; its state after a run is read back through a second
resource manager on the same definition (pyvisa-sim keeps one device per definition file).
"""

from __future__ import annotations

import numpy as np
import pytest

pyvisa = pytest.importorskip("pyvisa")
pytest.importorskip("pyvisa_sim")
serial = pytest.importorskip("serial")

from fieldplan import Channel, ChannelLimit, HardwareLimits, Schedule, Segment  # noqa: E402
from fieldplan.errors import LimitError  # noqa: E402
from fieldplan.lab.drivers import (ArrayWriter, DriverError, InstrumentProfile, NidaqmxWriter,  # noqa: E402
                                   SerialLine, SerialTransport, ToneGenerator, VisaTransport, WaveformDriver,
                                   load_profile, open_driver, waveforms)
from fieldplan.lab.inputlog import read_input_log  # noqa: E402

DEVICE_YAML = r'''
spec: "1.1"
devices:
  tonegen:
    eom:
      ASRL INSTR:
        q: "\n"
        r: "\n"
    error: ERROR
    dialogues:
      - q: "*IDN?"
        r: "Invented Instruments,TG-1,0,1.0"
      - q: "SYST:ERR?"
        r: "0,No error"
    properties:
      frequency:
        default: 1000.0
        getter: {q: "FREQ?", r: "{:.3f}"}
        setter: {q: "FREQ {:.3f}", r: OK}
        specs: {min: 1, max: 100000, type: float}
      amplitude:
        default: 3.0
        getter: {q: "VOLT?", r: "{:.4f}"}
        setter: {q: "VOLT {:.4f}", r: OK}
        specs: {min: 0, max: 10, type: float}
      output:
        default: 1
        getter: {q: "OUTP?", r: "{:d}"}
        setter: {q: "OUTP {:d}", r: OK}
        specs: {valid: [0, 1], type: int}
resources:
  ASRL1::INSTR:
    device: tonegen
'''

PROFILE_YAML = '''
commands:
  tone_freq: "FREQ {value:.3f}"
  tone_amp: "VOLT {value:.4f}"
output_on: ["OUTP 1"]
output_off: ["OUTP 0"]
ack: "^OK$"
error_query: "SYST:ERR?"
error_ok: "^0,"
timeout: 1.0
'''

CHANNELS = (Channel("tone_freq", "Hz", 100.0, 20000.0, idle=1000.0), Channel("tone_amp", "V", 0.0, 20.0))
LIMITS = HardwareLimits({"tone_amp": ChannelLimit(upper=12.0)})


@pytest.fixture
def sim(tmp_path):
    dev = tmp_path / "tonegen.yaml"
    dev.write_text(DEVICE_YAML)
    prof = tmp_path / "profile.yaml"
    prof.write_text(PROFILE_YAML)
    backend = f"{dev}@sim"

    def state():
        rm = pyvisa.ResourceManager(backend)
        inst = rm.open_resource("ASRL1::INSTR", write_termination="\n", read_termination="\n")
        out = {"freq": float(inst.query("FREQ?")), "amp": float(inst.query("VOLT?")), "out": int(inst.query("OUTP?"))}
        inst.close()
        return out

    return {"backend": backend, "profile": prof, "state": state, "url": f"visa://ASRL1::INSTR@{backend}"}


def tones():
    segs = [Segment(0.0, 0.5, [2000.0, 1.5], "low"), Segment(0.5, 0.5, [2000.0, 2.5], "loud"),
            Segment(1.0, 0.5, [1000.0, 0.0], "idle"), Segment(1.5, 0.5, [5000.0, 1.0], "high")]
    return Schedule.from_segments(CHANNELS, segs)


def test_tone_generator_on_pyvisa_sim_sends_logs_and_ends_idle(sim, tmp_path):
    assert sim["state"]() == {"freq": 1000.0, "amp": 3.0, "out": 1}       # the instrument starts "on"
    log = tmp_path / "sent.csv"
    drv = open_driver(sim["url"], CHANNELS, LIMITS, profile=sim["profile"], log=log)
    assert isinstance(drv, ToneGenerator)
    with drv:
        assert sim["state"]()["out"] == 0                                 # opening idles it first
        for seg in tones().segments[:2]:
            drv(seg)
        assert sim["state"]() == {"freq": 2000.0, "amp": 2.5, "out": 1}
    assert sim["state"]() == {"freq": 1000.0, "amp": 0.0, "out": 0}       # back at idle, output off
    sent = [r[3] for r in drv.log_rows]
    assert sent[1] == "FREQ 2000.000; VOLT 1.5000; OUTP 1"                # values first, then output on
    assert sent[2] == "VOLT 2.5000"                                       # only what changed
    assert sent[-1].startswith("OUTP 0")                                  # idle: output off first
    assert all(r[4].endswith("0,No error") for r in drv.log_rows)
    rows = read_input_log(log)                                            # the log is an input log
    assert rows.primitive[:3] == ["idle", "low", "loud"]
    np.testing.assert_allclose(rows.values[2], [2000.0, 2.5])
    assert np.all(np.diff(rows.times) > 0)


def test_segment_over_a_declared_limit_is_refused_and_the_instrument_idled(sim):
    with open_driver(sim["url"], CHANNELS, LIMITS, profile=sim["profile"]) as drv:
        drv(Segment(0.0, 0.5, [2000.0, 2.0], "ok"))
        with pytest.raises(LimitError, match="tone_amp.*upper limit 12"):
            drv(Segment(0.5, 0.5, [2000.0, 15.0], "too loud"))
        assert sim["state"]() == {"freq": 1000.0, "amp": 0.0, "out": 0}
        assert not any("15.0000" in r[3] for r in drv.log_rows)          # nothing of it was sent
    slew = HardwareLimits({"tone_amp": ChannelLimit(slew_rate=2.0)})      # 2 V/s
    with open_driver(sim["url"], CHANNELS, slew, profile=sim["profile"]) as drv:
        drv(Segment(0.0, 0.5, [2000.0, 1.0]))
        with pytest.raises(LimitError, match="slew"):
            drv(Segment(0.5, 0.5, [2000.0, 3.0]))                         # 2 V in 0.5 s
    rms = HardwareLimits({"tone_amp": ChannelLimit(rms=2.0, rms_window=1.0)})
    with open_driver(sim["url"], CHANNELS, rms, profile=sim["profile"]) as drv:
        drv(Segment(0.0, 0.5, [2000.0, 2.5]))                             # RMS over 1 s: 1.77 V
        with pytest.raises(LimitError, match="RMS"):
            drv(Segment(0.5, 0.5, [2000.0, 2.5]))                         # 2.5 V RMS over the window


def test_instrument_error_reply_idles_and_raises(sim):
    """The declared limits allow 12 V but the instrument's own range ends at 10 V: it answers ERROR."""
    with open_driver(sim["url"], CHANNELS, LIMITS, profile=sim["profile"]) as drv:
        with pytest.raises(DriverError, match="'VOLT 11.0000' answered 'ERROR'"):
            drv(Segment(0.0, 0.5, [2000.0, 11.0]))
        assert sim["state"]()["out"] == 0


def test_profiles_are_checked(tmp_path, sim):
    bad = tmp_path / "bad.yaml"
    bad.write_text("commands:\n  tone_freq: 'F {value}'\n  tone_amp: 'A {value}'\nvolume: 3\n")
    with pytest.raises(DriverError, match=r"bad.yaml:4: unknown key 'volume'"):
        load_profile(bad)
    prof = InstrumentProfile(commands={"tone_freq": "F {value.__class__}", "tone_amp": "A {value}"})
    with pytest.raises(DriverError, match="only named fields"):
        ToneGenerator(CHANNELS, None, None, prof)
    prof = InstrumentProfile(commands={"tone_freq": "F {value}"})
    with pytest.raises(DriverError, match=r"no command template for channel\(s\) \['tone_amp'\]"):
        ToneGenerator(CHANNELS, None, None, prof)
    with pytest.raises(DriverError, match="cannot open VISA resource"):
        VisaTransport("ASRL1::INSTR", backend=str(tmp_path / "missing.yaml") + "@sim")


# -- serial line --------------------------------------------------------------------------------
COILS = (Channel("coil_1", "A", -2.0, 2.0), Channel("coil_2", "A", -2.0, 2.0))


def test_serial_line_over_loopback_sends_one_line_per_segment_and_checks_the_ack(tmp_path):
    """pyserial's loop:// echoes every line back: the acknowledgement is the line itself."""
    prof = InstrumentProfile(line="SEG {index} {duration_ms:.0f} {coil_1:+.3f} {coil_2:+.3f}",
                             idle_line="IDLE", ack=r"^(SEG|IDLE)", timeout=0.5)
    drv = open_driver("serial://loop://", COILS, None, profile=prof)
    assert isinstance(drv, SerialLine)
    with drv:
        drv(Segment(0.0, 0.25, [1.5, -0.5], "pull"))
        drv(Segment(0.25, 0.1, [0.0, 2.0]))
    texts = [(r[3], r[4]) for r in drv.log_rows]
    assert texts == [("IDLE", "IDLE"), ("SEG 0 250 +1.500 -0.500", "SEG 0 250 +1.500 -0.500"),
                     ("SEG 1 100 +0.000 +2.000", "SEG 1 100 +0.000 +2.000"), ("IDLE", "IDLE")]
    assert drv.log_rows[2][1] == "coil_2=2 A"                           # unnamed setting: named by its values


def test_serial_ack_mismatch_and_timeout_idle_the_line():
    prof = InstrumentProfile(line="SEG {values}", idle_line="IDLE", ack="^OK$", timeout=0.2)
    tr = SerialTransport("loop://", timeout=0.2)
    drv = SerialLine(COILS, None, tr, InstrumentProfile(line="SEG {values}", idle_line="IDLE", ack="^(IDLE|OK)$",
                                                        timeout=0.2))
    with drv, pytest.raises(DriverError, match="does not match the expected acknowledgement"):
        drv(Segment(0.0, 0.1, [1.0, 1.0]))
    assert drv.log_rows[-1][3] == "IDLE"
    # a device that never ends its reply (wrong terminator): no complete reply within the timeout
    tr = SerialTransport("loop://", timeout=0.2, write_termination="\r", read_termination="\n")
    with pytest.raises(DriverError, match="no complete reply within 0.2 s"):
        SerialLine(COILS, None, tr, prof).open()


# -- analog output ----------------------------------------------------------------------------------
def test_waveforms_and_the_waveform_driver():
    sched = Schedule.from_segments(COILS, [Segment(0, 0.01, [1.0, -1.0], "a"), Segment(0.01, 0.005, [0.5, 0.0], "b")])
    t, data = waveforms(sched, 1000.0, scale=[2.0, 2.0], offset=[0.0, 0.5])      # 2 V/A amplifier input
    assert data.shape == (2, 15) and t[1] - t[0] == pytest.approx(1e-3)
    np.testing.assert_allclose(data[:, 0], [2.0, -1.5])
    np.testing.assert_allclose(data[:, -1], [1.0, 0.5])
    writer = ArrayWriter(2, min_val=-5, max_val=5)
    with WaveformDriver(COILS, None, writer, 1000.0, scale=2.0) as drv:
        for seg in sched.segments:
            drv(seg)
    blocks = [b for r, b in writer.blocks if r > 0]
    assert [b.shape[1] for b in blocks] == [10, 5]
    np.testing.assert_allclose(np.hstack(blocks), waveforms(sched, 1000.0, scale=2.0)[1])
    np.testing.assert_allclose(writer.level, [0.0, 0.0])                        # idle at the end
    with pytest.raises(DriverError, match=r"outside the output range \[-1, 1\] V"):
        WaveformDriver(COILS, None, ArrayWriter(2, min_val=-1, max_val=1), 1000.0)


def test_nidaqmx_writer_needs_a_driver():
    try:
        import nidaqmx  # noqa: F401
    except ImportError:
        pytest.skip("nidaqmx (the 'daq' extra) is not installed")
    try:
        writer = NidaqmxWriter(["Dev1/ao0"])
    except DriverError as exc:
        pytest.skip(f"no NI-DAQmx driver or device on this machine: {exc}")
    with WaveformDriver(COILS[:1], None, writer, 1000.0) as drv:           # pragma: no cover - needs hardware
        drv(Segment(0.0, 0.01, [0.1]))
        assert drv.segments_sent == 1
    assert drv.at_idle                                                     # back at the idle input


def test_dry_run_formats_and_logs_without_an_instrument(sim):
    """--dry-run: the same command text, nothing opened, no acknowledgement awaited."""
    drv = open_driver("visa://TCPIP::192.0.2.1::INSTR", CHANNELS, LIMITS, profile=sim["profile"], dry_run=True)
    with drv:
        drv(Segment(0.0, 0.5, [2000.0, 1.5], "low"))
    assert drv.transport.sent[:3] == ["OUTP 0", "FREQ 1000.000", "VOLT 0.0000"]
    assert "FREQ 2000.000" in drv.transport.sent
    assert drv.transport.sent[-4:] == ["OUTP 0", "FREQ 1000.000", "VOLT 0.0000", "SYST:ERR?"]     # idle at the end


def test_template_fields_are_bounded():
    with pytest.raises(DriverError, match="width or precision above 64"):
        SerialLine(COILS, None, None, InstrumentProfile(line="SEG {coil_1:999999999}"))
    with pytest.raises(DriverError, match="unknown field"):
        SerialLine(COILS, None, None, InstrumentProfile(line="SEG {coil_3}"))


def test_limit_guard_accepts_every_schedule_that_passes_schedule_check():
    """The per-segment re-check never refuses a schedule Schedule.check accepts (bounds, slew, dwell,
    windowed and whole-run RMS), and refuses the first segment over a bound."""
    from fieldplan.lab.drivers import LimitGuard

    rng = np.random.default_rng(0)
    ch = (Channel("a", "A", -2.0, 2.0), Channel("b", "V", 0.0, 5.0))
    accepted = 0
    for trial in range(150):
        n = int(rng.integers(1, 12))
        d = rng.choice([0.1, 0.2, 0.5], n)
        v = np.column_stack([rng.uniform(-2, 2, n), rng.uniform(0, 5, n)])
        sched = Schedule.from_segments(ch, [Segment(0, dd, vv) for dd, vv in zip(d, v)])
        lim = HardwareLimits({"a": ChannelLimit(slew_rate=float(rng.uniform(2, 40)), rms=float(rng.uniform(0.8, 2)),
                                                rms_window=float(rng.choice([0.3, 1.0]))),
                              "b": ChannelLimit(upper=4.5, rms=float(rng.uniform(1, 4)))})
        if sched.violations(lim):
            continue
        guard = LimitGuard(ch, lim)
        guard.horizon = sched.duration
        for seg in sched.segments:
            guard.check(seg)
            guard.accept(seg)
        accepted += 1
    assert accepted > 10
    guard = LimitGuard(ch, HardwareLimits({"b": ChannelLimit(upper=4.5)}))
    with pytest.raises(LimitError, match="'b' = 4.8 V"):
        guard.check(Segment(0, 0.1, [0.0, 4.8]))
