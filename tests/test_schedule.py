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
    s = sched()
    s.write_csv(tmp_path / "s.csv")
    back = Schedule.read_csv(tmp_path / "s.csv", CH)
    assert back == s
    assert back.labels == s.labels
    head = (tmp_path / "s.csv").read_text().splitlines()[0]
    assert head == "start [s],duration [s],coil_1 [A],coil_2 [A],label"


def test_json_round_trip_is_exact(tmp_path):
    s = sched()
    lim = HardwareLimits.from_channels(CH)
    s.write_json(tmp_path / "s.json", limits=lim, extra={"scenario_hash": "abc"})
    back = Schedule.read_json(tmp_path / "s.json")
    assert back == s
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
    with pytest.raises(LimitError, match=r"coil_2.*2\.5 A.*t = 0\.0405") as err:
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
