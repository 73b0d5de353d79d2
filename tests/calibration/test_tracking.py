"""Tests of fieldplan.calibration.tracking: the tracking CSV reader, its cleaning reports, and Savitzky-Golay velocities."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import fieldplan
from fieldplan.calibration.tracking import (
    TrackingData,
    TrackingDataError,
    TrackingWarning,
    read_tracks,
    synthetic_tracks,
    velocity_samples,
    write_tracks,
)
from fieldplan.contract.testing import SourceArray
from fieldplan.errors import FieldplanError, UnitError

BEAD = fieldplan.Body("bead", radius=2e-6, density=1100.0)


def write(tmp_path, text, name="t.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def rows(track, times, xs, ys, prim="push", extra=""):
    return "".join(f"{track},{t:.6f},{x:.9g},{y:.9g},{prim}{extra}\n" for t, x, y in zip(times, xs, ys))


HEAD = "track,time [s],x [um],y [um],primitive\n"


def smooth_track(n=60, dt=0.1, v=(2.0, -1.0), noise=0.0, rng=0):
    """Straight track at v um/s, optional noise in um."""
    g = np.random.default_rng(rng)
    t = np.arange(n) * dt
    x = 100 + v[0] * t + noise * g.standard_normal(n)
    y = 200 + v[1] * t + noise * g.standard_normal(n)
    return t, x, y


# -- Savitzky-Golay against analytic derivatives -----------------------------------------------
def test_savgol_exact_for_quadratic_trajectory(tmp_path):
    """A degree-2 Savitzky-Golay filter reproduces polynomials up to degree 2 exactly, so the
    derivative of a constant-acceleration path is exact (Savitzky & Golay, Anal. Chem. 36, 1627, 1964)."""
    dt = 0.05
    t = np.arange(80) * dt
    x = 50 + 3.0 * t + 0.8 * t**2           # um
    y = 20 - 1.5 * t - 0.3 * t**2
    data = read_tracks(write(tmp_path, HEAD + rows("a", t, x, y)))
    s = velocity_samples(data, window=11, polyorder=2)
    want = np.column_stack([3.0 + 1.6 * s.time, -1.5 - 0.6 * s.time]) * 1e-6
    np.testing.assert_allclose(s.velocity, want, rtol=1e-6, atol=1e-12)
    np.testing.assert_allclose(s.xy[:, 0], (50 + 3.0 * s.time + 0.8 * s.time**2) * 1e-6, rtol=1e-7)


def test_savgol_derivative_error_matches_taylor_term(tmp_path):
    """For x = A sin(w t) the least-squares slope over 2h+1 frames is
    x' + x''' dt^2 sum(j^4) / (6 sum(j^2)) + O(dt^4) (derived: Taylor expansion of the
    Savitzky-Golay derivative filter c_j = j / (dt sum j^2), Savitzky & Golay 1964)."""
    A, w, dt, win = 40.0, 2.0, 0.05, 9          # um, rad/s, s, frames
    t = np.arange(200) * dt
    x = A * np.sin(w * t)
    y = np.zeros_like(t)
    data = read_tracks(write(tmp_path, HEAD + rows("a", t, x, y)))
    s = velocity_samples(data, window=win, polyorder=2, stride=1)
    j = np.arange(-(win // 2), win // 2 + 1)
    k = np.sum(j**4) / (6.0 * np.sum(j**2))
    exact = A * w * np.cos(w * s.time) * 1e-6
    lead = -A * w**3 * np.cos(w * s.time) * dt**2 * k * 1e-6
    err = s.velocity[:, 0] - exact
    assert np.max(np.abs(err)) > 0.5 * np.max(np.abs(lead))        # the filter is not exact here
    np.testing.assert_allclose(err, lead, atol=0.02 * np.max(np.abs(lead)))


def test_noise_estimate_and_velocity_sigma():
    """With iid tracking noise sigma, the estimated position noise is sigma and the derivative's
    spread is sigma * |c| / dt (variance of a linear filter; Savitzky & Golay 1964)."""
    act = SourceArray([[0, 0], [1e-3, 0]], core=3e-4, affine=False, extent=(0, 1e-3, 0, 1e-3))
    starts = np.random.default_rng(1).uniform(2e-4, 8e-4, (30, 2))
    sigma = 0.4e-6
    data = synthetic_tracks(act, BEAD, fieldplan.water(), starts, [("a", [1, 0], 12.0)], noise=sigma, rng=2)
    s = velocity_samples(data)
    assert s.position_noise == pytest.approx(sigma, rel=0.05)
    true = act.velocity(BEAD, fieldplan.water(), s.xy, [1, 0])
    spread = np.std(s.velocity - true)
    assert spread == pytest.approx(np.mean(s.sigma), rel=0.12)


# -- reader: units, layout, errors --------------------------------------------------------------
def test_units_from_header_and_argument(tmp_path):
    t, x, y = smooth_track(20)
    p = write(tmp_path, "track,time [ms],x [mm],y [mm],primitive\n" + rows("a", t * 1e3, x * 1e-3, y * 1e-3))
    d = read_tracks(p)
    np.testing.assert_allclose(d.time, t)
    np.testing.assert_allclose(d.xy[:, 0], x * 1e-6)
    p2 = write(tmp_path, "track,time,x,y,primitive\n" + rows("a", t, x, y), "u.csv")
    d2 = read_tracks(p2, units={"time": "s", "x": "um", "y": "um"})
    np.testing.assert_allclose(d2.xy, d.xy)
    with pytest.raises(UnitError, match="column 'x' has no unit"):
        read_tracks(p2, units={"time": "s"})
    with pytest.raises(TrackingDataError, match="in the header but"):
        read_tracks(p, units={"x": "um"})
    pixels = write(tmp_path, "track,time [s],x [px],y [px],primitive\n" + rows("a", t, x, y), "px.csv")
    with pytest.raises(UnitError, match="camera pixels are not a length"):
        read_tracks(pixels)
    wrong = write(tmp_path, "track,time [s],x [s],y [um],primitive\n" + rows("a", t, x, y), "d.csv")
    with pytest.raises(UnitError, match="dimension"):
        read_tracks(wrong)


def test_empty_file(tmp_path):
    with pytest.raises(TrackingDataError, match="empty"):
        read_tracks(write(tmp_path, ""))
    with pytest.raises(TrackingDataError, match="empty"):
        read_tracks(write(tmp_path, "# only a comment\n\n", "c.csv"))
    with pytest.raises(TrackingDataError, match="header but no data rows"):
        read_tracks(write(tmp_path, HEAD, "h.csv"))
    with pytest.raises(TrackingDataError, match="not found"):
        read_tracks(tmp_path / "nope.csv")


def test_missing_columns_named(tmp_path):
    t, x, y = smooth_track(10)
    text = "track,time [s],x [um],primitive\n" + "".join(f"a,{a},{b},p\n" for a, b in zip(t, x))
    with pytest.raises(TrackingDataError, match=r"missing required column\(s\) \['y'\]") as exc:
        read_tracks(write(tmp_path, text))
    assert "t.csv:1" in str(exc.value)
    text = "track,time [s],x [um],y [um]\n" + "".join(f"a,{a},{b},0\n" for a, b in zip(t, x))
    with pytest.raises(TrackingDataError, match="no 'primitive' column and no channel"):
        read_tracks(write(tmp_path, text, "n.csv"))
    text = "track,time [s],x [um],y [um],primitive,gain\n" + "".join(f"a,{a},{b},0,p,1\n" for a, b in zip(t, x))
    with pytest.raises(TrackingDataError, match="column 'gain'.*no unit"):
        read_tracks(write(tmp_path, text, "g.csv"))


def test_non_monotonic_time_names_track_and_line(tmp_path):
    t, x, y = smooth_track(10)
    order = np.arange(10)
    order[6], order[7] = 7, 6            # two rows written out of order
    t, x, y = t[order], x[order], y[order]
    p = write(tmp_path, HEAD + rows("b", t[:3], x[:3], y[:3]) + rows("a", t, x, y))
    with pytest.raises(TrackingDataError, match="time goes back") as exc:
        read_tracks(p)
    msg = str(exc.value)
    assert "track 'a'" in msg and "t.csv:12" in msg      # header line 1, 3 rows of b, 8th row of a
    d = read_tracks(p, sort=True, warn=False)
    assert [i.kind for i in d.issues] == ["sorted"]
    assert np.all(np.diff(d.time[d.track == "a"]) > 0)
    t2 = smooth_track(10)[0].copy()
    t2[4] = t2[3]
    with pytest.raises(TrackingDataError, match="time repeats"):
        read_tracks(write(tmp_path, HEAD + rows("a", t2, x, y), "r.csv"))


def test_bad_cells_named(tmp_path):
    t, x, y = smooth_track(5)
    text = HEAD + rows("a", t, x, y).replace(f"{x[2]:.9g}", "1.2.3", 1)
    with pytest.raises(TrackingDataError, match=r"t.csv:4, column 'x': '1.2.3' is not a number"):
        read_tracks(write(tmp_path, text))
    text = HEAD + rows("a", t, x, y) + "a,0.9,1\n"
    with pytest.raises(TrackingDataError, match="row has 3 cells"):
        read_tracks(write(tmp_path, text, "s.csv"))


def test_primitive_with_two_settings_is_an_error(tmp_path):
    head = "track,time [s],x [um],y [um],primitive,coil_1 [mA]\n"
    t, x, y = smooth_track(6)
    text = head + rows("a", t[:3], x[:3], y[:3], extra=",100") + rows("a", t[3:], x[3:], y[3:], extra=",200")
    with pytest.raises(TrackingDataError, match="primitive 'push' has channel values"):
        read_tracks(write(tmp_path, text))


def test_channel_columns_name_settings(tmp_path):
    head = "track,time [s],x [um],y [um],coil_1 [mA],coil_2 [A]\n"
    t, x, y = smooth_track(20)
    body = "".join(f"a,{a},{b},{c},{1500 if i < 10 else 0},0\n" for i, (a, b, c) in enumerate(zip(t, x, y)))
    d = read_tracks(write(tmp_path, head + body))
    assert d.primitives == ["coil_1=1.5 A", "idle"]
    assert d.channels == (("coil_1", "A"), ("coil_2", "A"))
    assert d.primitive_values["coil_1=1.5 A"] == (1.5, 0.0)


def test_kind_change_within_track(tmp_path):
    t, x, y = smooth_track(6)
    head = "track,time [s],x [um],y [um],primitive,kind\n"
    text = head + rows("a", t[:3], x[:3], y[:3], extra=",bead") + rows("a", t[3:], x[3:], y[3:], extra=",cell")
    with pytest.raises(TrackingDataError, match="changes body kind"):
        read_tracks(write(tmp_path, text))


# -- cleaning: gaps, missing positions, jumps, outliers ------------------------------------------
def test_gap_and_missing_frames_reported_and_split(tmp_path):
    t, x, y = smooth_track(60, noise=0.05)
    keep = np.ones(60, bool)
    keep[30:34] = False                 # 4 frames not reported at all
    text = rows("a", t[keep], x[keep], y[keep])
    lines = text.splitlines(keepends=True)
    lines[10] = f"a,{t[10]:.6f},,,push\n"   # tracker lost the bead in one frame
    with pytest.warns(TrackingWarning, match="gap"):
        d = read_tracks(write(tmp_path, HEAD + "".join(lines)))
    kinds = [i.kind for i in d.issues]
    assert kinds.count("missing") == 1 and kinds.count("gap") == 2
    gap = [i for i in d.issues if i.kind == "gap" and i.time > 2][0]
    assert gap.track == "a" and gap.time == pytest.approx(t[29]) and "4 frame(s) missing" in gap.message
    missing = [i for i in d.issues if i.kind == "missing"][0]
    assert missing.line == 12 and missing.time == pytest.approx(t[10])
    assert len(d.segment_slices()) == 3
    assert len(d) == 60 - 4 - 1


def test_jump_and_outlier_detected_without_false_alarms(tmp_path):
    """Clean noisy tracks give no reports; an identity swap gives one jump, a spike one outlier."""
    act = SourceArray([[0, 0], [1e-3, 0]], core=3e-4, affine=False, extent=(0, 1e-3, 0, 1e-3))
    starts = np.random.default_rng(3).uniform(2e-4, 8e-4, (12, 2))
    data = synthetic_tracks(act, BEAD, fieldplan.water(), starts, [("a", [1, 0], 8.0), ("b", [0, 1], 8.0)],
                            noise=0.3e-6, brownian=True, rng=4)
    p = tmp_path / "clean.csv"
    write_tracks(p, data)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        clean = read_tracks(p)
    assert clean.issues == []
    i2 = np.flatnonzero(data.track == "b2")
    i5 = np.flatnonzero(data.track == "b5")
    data.xy[i2[100]:i2[-1] + 1] += [30e-6, 10e-6]
    data.xy[i5[40]] += [0.0, 12e-6]
    write_tracks(p, data)
    with pytest.warns(TrackingWarning, match="1 jump, 1 outlier"):
        d = read_tracks(p)
    jump = [i for i in d.issues if i.kind == "jump"]
    out = [i for i in d.issues if i.kind == "outlier"]
    assert len(jump) == 1 and jump[0].track == "b2" and jump[0].time == pytest.approx(data.time[i2[99]])
    assert len(out) == 1 and out[0].track == "b5" and out[0].time == pytest.approx(data.time[i5[40]])
    assert not np.any((d.track == "b5") & np.isclose(d.time, data.time[i5[40]]))
    # an explicit max_jump larger than the swap accepts it
    d2 = read_tracks(p, max_jump="100 um", warn=False)
    assert not [i for i in d2.issues if i.kind == "jump"]


def test_short_segment_dropped_with_warning(tmp_path):
    t, x, y = smooth_track(40, noise=0.05)
    text = rows("a", t[:30], x[:30], y[:30]) + rows("a", t[30:33], x[30:33], y[30:33], prim="pull")
    text += rows("a", t[33:], x[33:], y[33:])
    d = read_tracks(write(tmp_path, HEAD + text))
    with pytest.warns(TrackingWarning, match="too short"):
        s = velocity_samples(d)
    short = [i for i in s.issues if i.kind == "short"]
    assert len(short) == 1 and "'pull'" in short[0].message and short[0].time == pytest.approx(t[30])
    assert "pull" not in set(s.primitive)
    with pytest.raises(TrackingDataError, match="window must be odd"):
        velocity_samples(d, window=8)
    with pytest.raises(TrackingDataError, match="no segment has enough frames"):
        velocity_samples(read_tracks(write(tmp_path, HEAD + rows("a", t[:3], x[:3], y[:3]), "3.csv")))


def test_write_read_round_trip(tmp_path):
    act = SourceArray([[0, 0], [1e-3, 0]], core=3e-4, affine=False, extent=(0, 1e-3, 0, 1e-3))
    starts = np.random.default_rng(0).uniform(2e-4, 8e-4, (4, 2))
    data = synthetic_tracks(act, BEAD, fieldplan.water(), starts, [("a", [1, 0], 2.0), ("idle", [0, 0], 1.0)],
                            noise=1e-7, rng=1)
    p = tmp_path / "rt.csv"
    write_tracks(p, data, length_unit="mm", time_unit="ms", comment="invented data\nsecond line")
    text = p.read_text()
    assert text.startswith("# invented data\n# second line\n")
    back = read_tracks(p)
    assert isinstance(back, TrackingData)
    np.testing.assert_allclose(back.xy, data.xy, rtol=1e-8)
    np.testing.assert_allclose(back.time, data.time, atol=1e-9)
    assert back.primitive_values == data.primitive_values and list(back.kind) == list(data.kind)
    assert not list(tmp_path.glob("*.tmp-*"))


def test_errors_are_fieldplan_errors():
    assert issubclass(TrackingDataError, FieldplanError) and issubclass(TrackingDataError, ValueError)
