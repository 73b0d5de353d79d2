import json

import numpy as np
import pytest

from fieldplan import Channel, ChannelLimit, HardwareLimits, LimitError, Schedule, Segment

CH = (Channel("coil_1", "A", -3, 3), Channel("coil_2", "A", -3, 3))


def sched():
    segs = [Segment(0, 0.013, [1.0, -0.5], "a"), Segment(0, 0.0271, [2.0, 0.25], "b"),
            Segment(0, 0.0004, [0.0, 0.0], "idle"), Segment(0, 0.05, [-1.0 / 3.0, 2.5], "c")]
    return Schedule.from_segments(CH, segs)


def test_csv_round_trip_is_exact(tmp_path):
    """What is written is the schedule quantised to the channel resolution, and it reads back exactly."""
    s = sched()
    s.write_csv(tmp_path / "s.csv")
    back = Schedule.read_csv(tmp_path / "s.csv", CH)
    q = s.quantise_values()
    assert back == q and back != s   # -1/3 A is not a multiple of the 1e-9 A default resolution
    assert back.labels == s.labels
    np.testing.assert_allclose(back.values, s.values, rtol=0, atol=0.5e-9)
    head = (tmp_path / "s.csv").read_text().splitlines()[0]
    assert head == "start [s],duration [s],coil_1 [A],coil_2 [A],label"


def test_json_round_trip_is_exact(tmp_path):
    s = sched()
    lim = HardwareLimits.from_channels(CH)
    s.write_json(tmp_path / "s.json", limits=lim, extra={"scenario_hash": "abc"})
    back = Schedule.read_json(tmp_path / "s.json")
    assert back == s.quantise_values(lim)
    # writing the quantised schedule again gives the same file (quantising is idempotent)
    q = s.quantise_values(lim)
    assert q.quantise_values(lim) == q
    q.write_json(tmp_path / "q.json", limits=lim, extra={"scenario_hash": "abc"})
    assert (tmp_path / "q.json").read_text() == (tmp_path / "s.json").read_text()
    d = json.loads((tmp_path / "s.json").read_text())
    assert d["channels"][0]["unit"] == "A" and d["scenario_hash"] == "abc" and d["limits_checked"]


def test_quantise_preserves_total_duration():
    s = sched()
    q = s.quantise(0.001, min_dwell=0.002)
    assert q.duration == pytest.approx(round(s.duration / 0.001) * 0.001, abs=1e-12)
    assert np.all(q.durations >= 0.002 - 1e-12)
    np.testing.assert_allclose(q.durations / 0.001, np.round(q.durations / 0.001), atol=1e-9)
    assert q.n_segments == 3   # the 0.4 ms idle slice is merged away


def test_check_rejects_value_naming_channel_and_time():
    s = sched()
    lim = HardwareLimits({"coil_2": ChannelLimit(upper=2.0)})
    with pytest.raises(LimitError, match=r"coil_2.*2\.5 A.*t = 40\.5 ms") as err:
        s.check(lim)
    assert err.value.channel == "coil_2" and err.value.limit == "upper"
    assert err.value.time == pytest.approx(0.0405)


def test_check_rejects_slew():
    s = sched()
    # coil_2 goes 0 -> 2.5 A at t = 0.0405 s; 10 A/s over a 1 ms step allows 0.01 A.
    lim = HardwareLimits({"coil_2": ChannelLimit(slew_rate=10.0)}, time_step=None)
    with pytest.raises(LimitError, match="coil_2 .*slew|coil_2' changes") as err:
        s.check(lim)
    assert err.value.limit == "slew_rate"


def test_check_rejects_rms_over_window():
    s = sched()
    # coil_2 holds 2.5 A for 50 ms: over a 50 ms window the RMS is 2.5 A.
    assert s.rms(0.05)[1] == pytest.approx(2.5)
    lim = HardwareLimits({"coil_2": ChannelLimit(rms=2.0, rms_window=0.05)})
    with pytest.raises(LimitError, match="RMS") as err:
        s.check(lim)
    assert err.value.channel == "coil_2" and err.value.limit == "rms"
    # over the whole schedule the RMS is lower and passes a looser limit
    whole = np.sqrt(np.sum(s.values[:, 1] ** 2 * s.durations) / s.duration)
    assert s.rms()[1] == pytest.approx(whole)
    s.check(HardwareLimits({"coil_2": ChannelLimit(rms=whole * 1.01)}))


def test_rms_window_brute_force():
    rng = np.random.default_rng(0)
    d = rng.uniform(0.01, 0.1, 30)
    v = rng.normal(size=(30, 2))
    s = Schedule.from_segments(CH, [Segment(0, di, vi) for di, vi in zip(d, v)])
    t, vals = s.resample(20000)
    w = 0.15
    nw = int(w * 20000)
    c = np.concatenate([[0], np.cumsum(vals[:, 0] ** 2)])
    brute = np.sqrt(np.max(c[nw:] - c[:-nw]) / nw)
    assert s.rms(w)[0] == pytest.approx(brute, rel=2e-3)


def test_write_refuses_violating_schedule_and_writes_nothing(tmp_path):
    s = sched()
    with pytest.raises(LimitError):
        s.write_csv(tmp_path / "x.csv", limits=HardwareLimits({"coil_1": ChannelLimit(upper=1.5)}))
    assert not list(tmp_path.iterdir())


def test_resample_and_value_at():
    s = sched()
    t, v = s.resample(1000)
    assert len(t) == int(s.duration * 1000 + 1e-9)
    np.testing.assert_array_equal(v[0], [1.0, -0.5])
    np.testing.assert_array_equal(s.value_at(0.02), [2.0, 0.25])
    np.testing.assert_array_equal(s.value_at(10.0), [0.0, 0.0])


# -- issue 16, item 9: at-limit schedules pass; exported values on the channel resolution --------

def test_at_limit_schedule_passes_with_documented_tolerance():
    """Round-off of a schedule planned exactly at a limit (README RMS example: 4e-16 over) passes;
    a real excess (1e-7 relative) is refused. Tolerance: LIMIT_RTOL relative to the limit."""
    from fieldplan.contract.schedule import LIMIT_RTOL, within_limit

    assert LIMIT_RTOL == 1e-9
    ch = (Channel("coil_1", "A", -1, 1),)
    at = 0.5 + 4e-16
    s = Schedule.from_segments(ch, [Segment(0, 1.0, [at]), Segment(0, 1.0, [-at])])
    assert s.rms()[0] > 0.5                      # a plain <= fails ...
    assert within_limit(s.rms()[0], 0.5)         # ... the documented comparison passes
    assert s.violations(HardwareLimits({"coil_1": ChannelLimit(upper=0.5, lower=-0.5, rms=0.5)})) == []
    over = Schedule.from_segments(ch, [Segment(0, 1.0, [0.5 * (1 + 1e-7)])])
    kinds = {v[3] for v in over.violations(HardwareLimits({"coil_1": ChannelLimit(upper=0.5, rms=0.5)}))}
    assert kinds == {"upper", "rms"}
    # slew exactly at its limit: 0 -> 0.3 A in one 10 ms step at 30 A/s
    ramp = Schedule.from_segments(ch, [Segment(0, 0.01, [0.0]), Segment(0, 0.01, [0.1 + 0.2])])
    assert ramp.violations(HardwareLimits({"coil_1": ChannelLimit(slew_rate=30.0)}, time_step=0.01)) == []
    assert within_limit(-0.5 - 1e-17, -0.5, lower=True) and not within_limit(-0.50001, -0.5, lower=True)


def test_hardware_csv_holds_decimal_values(tmp_path):
    """13.35 V, not 13.350000000000001; start times summed from 10 ms steps written as decimals."""
    ch = (Channel("pad", "V", -20, 20),)
    v = 13.350000000000001
    assert repr(v) != "13.35"
    ts = 0.01
    # 1335 steps of 10 ms laid end to end: the float sum is 13.34999999999976 s
    s = Schedule.from_segments(ch, [Segment(0, ts, [v])] * 1335 + [Segment(0, 0.07, [0.1 + 0.2])])
    assert repr(float(s.starts[-1])) == "13.34999999999976"
    lim = HardwareLimits(time_step=ts)
    s.write_csv(tmp_path / "s.csv", limits=lim)
    rows = (tmp_path / "s.csv").read_text().splitlines()
    assert rows[1] == "0.0,0.01,13.35,"
    assert rows[-1] == "13.35,0.07,0.3,"
    back = Schedule.read_csv(tmp_path / "s.csv", ch)
    assert back == s.quantise_values(lim)


def test_declared_resolution_is_a_dac_step():
    """Declared resolution (a 12-bit DAC over +-3 A): every exported value is a multiple of it."""
    res = 6.0 / 4096
    ch = (Channel("coil_1", "A", -3, 3),)
    rng = np.random.default_rng(3)
    vals = rng.uniform(-2.9, 2.9, size=(40, 1))
    s = Schedule.from_segments(ch, [Segment(0, 0.01, v) for v in vals])
    lim = HardwareLimits({"coil_1": ChannelLimit(resolution=res)})
    q = s.quantise_values(lim)
    k = q.values[:, 0] / res
    np.testing.assert_allclose(k, np.round(k), atol=1e-6)
    assert np.max(np.abs(q.values - s.values)) <= res / 2 + 1e-12
    with pytest.raises(Exception, match="resolution"):
        ChannelLimit(resolution=0.0)


def test_quantising_never_creates_a_violation():
    """Values at a bound off the grid, at the slew limit and at the RMS limit stay within them."""
    ch = (Channel("coil_1", "A", -3, 3),)
    res = 0.01
    # upper bound 0.333 is not on the 0.01 grid: 0.333 must become 0.33, not 0.34 (nor 0.333)
    lim = HardwareLimits({"coil_1": ChannelLimit(upper=0.333, resolution=res)})
    s = Schedule.from_segments(ch, [Segment(0, 1.0, [0.333]), Segment(0, 1.0, [0.3349 - 0.002])])
    q = s.quantise_values(lim)
    assert q.values[0, 0] == 0.33 and q.violations(lim) == []
    # a ramp at exactly its slew rate (0.025 A per 10 ms step, 2.5 resolution steps): rounding each
    # value alone would make 0.03 A steps; the quantiser keeps every step within 0.025 A
    lim = HardwareLimits({"coil_1": ChannelLimit(slew_rate=2.5, resolution=res)}, time_step=0.01)
    ramp = Schedule.from_segments(ch, [Segment(0, 0.01, [0.025 * j]) for j in range(12)])
    assert ramp.violations(lim) == []
    naive = np.round(ramp.values / res) * res
    assert np.max(np.abs(np.diff(naive[:, 0]))) > 0.025 + 1e-9
    q = ramp.quantise_values(lim)
    assert q.violations(lim) == []
    assert np.max(np.abs(q.values - ramp.values)) <= 6 * res
    # at the RMS limit: rounding half-up would push the RMS over 0.505; towards zero cannot
    lim = HardwareLimits({"coil_1": ChannelLimit(rms=0.505, resolution=res)})
    at = Schedule.from_segments(ch, [Segment(0, 1.0, [0.505]), Segment(0, 1.0, [-0.505])])
    q = at.quantise_values(lim)
    assert q.violations(lim) == [] and np.all(np.abs(q.values) <= 0.505)


def test_quantising_does_not_hide_a_real_violation(tmp_path):
    """A value beyond a bound or a jump beyond the slew limit is left as it is, and refused."""
    ch = (Channel("coil_1", "A", -3, 3),)
    lim = HardwareLimits({"coil_1": ChannelLimit(upper=1.5, slew_rate=1.0)}, time_step=0.1)
    s = Schedule.from_segments(ch, [Segment(0, 0.1, [0.0]), Segment(0, 0.1, [2.0])])
    kinds = {v[3] for v in s.quantise_values(lim).violations(lim)}
    assert kinds == {"upper", "slew_rate"}
    with pytest.raises(LimitError):
        s.write_csv(tmp_path / "x.csv", limits=lim)
    assert not list(tmp_path.iterdir())


def test_discrete_channels_are_not_quantised():
    """Tone frequencies are a declared set: exported exactly as declared."""
    f = 420.66632177001
    ch = (Channel("frequency", "Hz", 100, 1000, 100, (100.0, f)), Channel("amplitude", "V", 0, 10))
    s = Schedule.from_segments(ch, [Segment(0, 0.5, [f, 3.074004132722617])])
    q = s.quantise_values()
    assert q.values[0, 0] == f and q.values[0, 1] == 3.07400413


def test_limit_messages_use_si_prefixes_and_no_unit_1():
    """'= 5 1' and '(1)/s' never appear; times and values carry their own SI prefixes."""
    ch = (Channel("gain", "1", 0, 10),)
    s = Schedule.from_segments(ch, [Segment(0, 0.002, [0.0]), Segment(0, 0.002, [5.0])])
    msgs = [v[0] for v in s.violations(HardwareLimits({"gain": ChannelLimit(upper=4.0, slew_rate=20.0)}))]
    text = " | ".join(msgs)
    assert "'gain' = 5 at t = 2 ms exceeds the upper limit 4" in text
    assert "the slew limit 20 /s allows 0.04 over 2 ms" in text
    assert " 1 " not in text and "(1)" not in text


# -- one schedule, checked many times: read-only arrays, remembered violations ------------------

def spy_scans(monkeypatch):
    """Replace ``Schedule._scan`` (the full check) by a counting wrapper; returns the list of
    ``(schedule, limits dict)`` scanned (the schedules are kept, so their ids are not reused)."""
    from fieldplan.contract import schedule as mod

    seen = []
    inner = mod.Schedule._scan

    def scan(self, limits):
        seen.append((self, json.dumps(limits.to_dict(), sort_keys=True)))
        return inner(self, limits)

    monkeypatch.setattr(mod.Schedule, "_scan", scan)
    return seen


def test_arrays_are_read_only_private_copies():
    starts, durs = np.array([0.0, 0.5]), np.array([0.5, 0.25])
    vals = np.array([[1.0, 0.0], [-1.0, 0.5]])
    s = Schedule(CH, starts, durs, vals, ["a", "b"])
    for arr in (s.starts, s.durations, s.values):
        with pytest.raises(ValueError, match="read-only"):
            arr[0] = 9.0
    with pytest.raises(ValueError, match="read-only"):
        s.values[:, 1] *= 2
    for name in ("starts", "durations", "values", "labels", "channels"):
        with pytest.raises(AttributeError):
            setattr(s, name, getattr(s, name))
    assert isinstance(s.labels, tuple) and isinstance(s.channels, tuple)
    # the caller's arrays are copied, not frozen: changing them later does not change the schedule
    vals[0, 0] = 2.0
    starts[1] = 0.7
    assert s.values[0, 0] == 1.0 and s.starts[1] == 0.5 and vals.flags.writeable
    # what the schedule hands out to be changed is a copy
    v = s.value_at(0.1)
    v[0] = 5.0
    assert s.values[0, 0] == 1.0


def test_pickled_schedule_stays_read_only():
    import pickle

    s = sched()
    s.check(HardwareLimits.from_channels(CH))
    back = pickle.loads(pickle.dumps(s))
    assert back == s and back.labels == s.labels and back.meta == s.meta
    with pytest.raises(ValueError, match="read-only"):
        back.values[0, 0] = 0.0


def test_labels_must_match_segments():
    with pytest.raises(Exception, match="1 labels for 2 segments"):
        Schedule(CH, [0.0, 0.5], [0.5, 0.5], [[0, 0], [1, 1]], ["a"])


def test_violations_are_remembered_per_limits_value(monkeypatch):
    seen = spy_scans(monkeypatch)
    s = sched()
    lim = HardwareLimits({"coil_2": ChannelLimit(upper=2.0, slew_rate=10.0)})
    first = s.violations(lim)
    assert len(seen) == 1 and {v[3] for v in first} == {"upper", "slew_rate"}
    # an equal limits value, a different object: no second scan, the same content
    again = HardwareLimits({"coil_2": ChannelLimit(upper=2.0, slew_rate=10.0)})
    assert again is not lim and s.violations(again) == first and len(seen) == 1
    with pytest.raises(LimitError, match="coil_2"):
        s.check(again)
    assert len(seen) == 1
    # the remembered result equals a fresh scan of an equal schedule
    fresh = Schedule(s.channels, s.starts, s.durations, s.values, s.labels)
    assert fresh.violations(lim) == first and len(seen) == 2
    # a caller changing the list it got changes nothing remembered
    got = s.violations(lim)
    got.clear()
    first_again = s.violations(lim)
    assert first_again == first and first_again is not first and len(seen) == 2
    # a different limits value scans again
    assert s.violations(HardwareLimits({"coil_2": ChannelLimit(upper=2.6)})) == [] and len(seen) == 3
    # limits changed in place (HardwareLimits is not frozen) are a different value: scanned again
    lim.channels["coil_2"] = ChannelLimit(upper=2.4)
    assert [v[3] for v in s.violations(lim)] == ["upper"] and len(seen) == 4
    # ... and changed back to a value already seen, remembered again
    lim.channels["coil_2"] = ChannelLimit(upper=2.6)
    assert s.violations(lim) == [] and len(seen) == 4
    # None checks nothing and scans nothing
    assert s.violations(None) == [] and s.check(None) is s and len(seen) == 4


def test_violations_memo_is_bounded(monkeypatch):
    seen = spy_scans(monkeypatch)
    s = sched()
    n = Schedule._MEMO_SIZE
    lims = [HardwareLimits({"coil_1": ChannelLimit(upper=2.0 + 0.1 * k)}) for k in range(n + 1)]
    for lim in lims:
        s.violations(lim)
    assert len(seen) == n + 1 and len(s._memo) == n
    s.violations(lims[-1])                 # still remembered
    assert len(seen) == n + 1
    s.violations(lims[0])                  # the least recently used was dropped: scanned again
    assert len(seen) == n + 2 and len(s._memo) == n


def test_quantise_values_of_a_quantised_schedule_is_itself(monkeypatch, tmp_path):
    lim = HardwareLimits.from_channels(CH, time_step=0.0001)
    s = sched()
    q = s.quantise_values(lim)
    assert q is not s and q != s
    assert q.quantise_values(lim) is q
    assert q.quantise_values() is q   # from_channels declares no resolution: the default, q is on it
    # so the writers' checks reuse the check already made: one scan for check + CSV + JSON
    seen = spy_scans(monkeypatch)
    q.check(lim)
    q.write_csv(tmp_path / "q.csv", lim)
    q.write_json(tmp_path / "q.json", limits=lim)
    assert [x[0] for x in seen] == [q]
    assert Schedule.read_csv(tmp_path / "q.csv", CH) == q == Schedule.read_json(tmp_path / "q.json")


def test_quantise_values_keeps_the_sign_of_zero():
    """-0.0 is written as '-0.0': a schedule is only returned as is when it is identical bit for bit."""
    ch = (Channel("coil_1", "A", -3, 3),)
    s = Schedule.from_segments(ch, [Segment(0, 0.5, [-0.0]), Segment(0, 0.5, [1.0])])
    q = s.quantise_values()
    assert q is s and np.signbit(q.values[0, 0])
    tiny = Schedule.from_segments(ch, [Segment(0, 0.5, [-1e-15]), Segment(0, 0.5, [1.0])])
    assert tiny.quantise_values() is not tiny


def test_remembered_violation_still_refused_by_the_writers(tmp_path):
    """A schedule on the grid with a violation: checked once, then each writer refuses it too."""
    ch = (Channel("coil_1", "A", -3, 3),)
    lim = HardwareLimits({"coil_1": ChannelLimit(upper=1.5)}, time_step=0.1)
    s = Schedule.from_segments(ch, [Segment(0, 0.1, [0.0]), Segment(0, 0.1, [2.0])])
    assert s.quantise_values(lim) is s
    with pytest.raises(LimitError, match="upper limit"):
        s.check(lim)
    with pytest.raises(LimitError, match="upper limit"):
        s.write_csv(tmp_path / "x.csv", limits=lim)
    with pytest.raises(LimitError, match="upper limit"):
        s.write_json(tmp_path / "x.json", limits=lim)
    assert not list(tmp_path.iterdir())


def test_plan_to_export_scans_each_schedule_once_per_limits(monkeypatch, tmp_path):
    """Plan, run and export a small scenario with limits: the schedule is checked several times on
    the way (planner, run, export, each writer), but each (schedule, limits) pair is scanned once."""
    from fieldplan.scenario import load_scenario
    from fieldplan.workflows.compare import run_scenario
    from fieldplan.workflows.export import write_outputs

    text = """\
name: scan-count
workspace: {boundary: {rectangle: [0, 0, 1 mm, 1 mm]}}
bodies: [{kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3}]
starts: [[0.3 mm, 0.3 mm], [0.7 mm, 0.3 mm]]
goals: [[0.3 mm, 0.7 mm], [0.7 mm, 0.7 mm]]
actuator: {type: source-array, sources: [[0 mm, 0 mm], [1 mm, 0 mm], [1 mm, 1 mm]], force: 3 pN}
planner: {tolerance: 30 um, max_steps: 60}
simulation: {trials: 0}
outputs: {plots: false}
limits:
  time_step: 0.05
  channels:
    source_1: {upper: 0.8, slew_rate: 5.0}
    source_2: {rms: 0.9}
"""
    sc = load_scenario(text, name="scan-count.yaml")
    seen = spy_scans(monkeypatch)
    calls = []
    inner = Schedule.violations
    monkeypatch.setattr(Schedule, "violations", lambda self, limits: calls.append(self) or inner(self, limits))
    run = run_scenario(sc, trials=0)
    write_outputs(tmp_path / "out", run)
    assert (tmp_path / "out" / "schedule.csv").exists()
    pairs = [(id(s), key) for s, key in seen]
    assert len(pairs) == len(set(pairs)), "a schedule was scanned twice against equal limits"
    key = json.dumps(sc.limits.to_dict(), sort_keys=True)
    assert (id(run.schedule), key) in pairs          # what was written was scanned, against these limits
    assert len(calls) > len(seen)                    # and checked more often than scanned
