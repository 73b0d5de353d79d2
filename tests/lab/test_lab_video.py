"""fieldplan.lab.video / pixels / inputlog: trackpy on synthetic frames rendered from known trajectories.

The frames are invented (Gaussian spots plus read noise, tests/lab/_lab_frames.py); the checks compare
the recovered positions and identities with the trajectories the frames were rendered from, and
the calibration from a synthetic video with the truth fields (the same analytic SourceArray and the
same 8 % dense-data threshold as tests/calibration/test_calibrate.py).
"""

from __future__ import annotations

import os
import warnings

import numpy as np
import pytest

pytest.importorskip("trackpy")
tifffile = pytest.importorskip("tifffile")

from _lab_frames import render_stack  # noqa: E402

import fieldplan  # noqa: E402
from fieldplan.calibration.calibrate import fit_field  # noqa: E402
from fieldplan.calibration.tracking import read_tracks, synthetic_tracks, velocity_samples  # noqa: E402
from fieldplan.contract.testing import SourceArray  # noqa: E402
from fieldplan.lab.inputlog import InputLogError, read_input_log  # noqa: E402
from fieldplan.lab.pixels import PixelMap, PixelMapError, read_marks  # noqa: E402
from fieldplan.lab.video import VideoError, read_frames, track_video, trackpy_settings, tracks_from_table  # noqa: E402

PX = 0.5e-6          # m per pixel
FPS = 20.0


def crossing_paths(frames=40, lag=8):
    """Two bodies on straight paths that cross (an X), body 1 passing the crossing ``lag`` frames
    after body 0 (closest approach 1.5 * lag px), 1.9 px per frame."""
    k = np.arange(frames, dtype=float)
    a = np.column_stack([20 + 1.5 * k, 10 + 1.2 * k])             # down-right
    b = np.column_stack([20 + 1.5 * (k - lag), 58 - 1.2 * (k - lag)])   # up-right
    return np.stack([a, b], axis=1)                                # (T, 2, 2) px


def write_log(path, rows, channels=("coil_1 [A]",)):
    head = "time [s],primitive," + ",".join(channels)
    path.write_text(head + "\n" + "\n".join(",".join(str(v) for v in r) for r in rows) + "\n")
    return path


def test_pixel_map_from_marks_scale_and_matrix():
    truth = PixelMap.from_scale("0.65 um", rotation=0.3, offset=("100 um", "-20 um"))
    px = np.array([[0, 0], [400, 10], [30, 300], [350, 280]], float)
    sim = PixelMap.from_marks(px[:2], truth(px[:2]))              # two marks: scale, rotation, offset
    aff = PixelMap.from_marks(px, truth(px))                      # four marks: affine, least squares
    probe = np.array([[123.4, 56.7], [5.0, 250.0]])
    for pm in (sim, aff):
        np.testing.assert_allclose(pm(probe), truth(probe), rtol=0, atol=1e-12)
        np.testing.assert_allclose(pm.inverse(pm(probe)), probe, atol=1e-9)
    assert sim.pixel_size == pytest.approx(0.65e-6, rel=1e-12)
    assert PixelMap.from_matrix(",".join(str(v) for v in truth.matrix.ravel()))(probe) == pytest.approx(truth(probe))
    noisy = truth(px) + [[0, 0], [0, 0], [0, 0], [5e-6, 0]]       # one mark entered 5 um off
    with pytest.raises(PixelMapError, match="residual"):
        PixelMap.from_marks(px, noisy, max_residual="0.5 um")
    with pytest.raises(PixelMapError, match="one line"):
        PixelMap.from_marks([[0, 0], [1, 1], [2, 2]], [[0, 0], [1e-6, 1e-6], [2e-6, 2e-6]])
    with pytest.raises(PixelMapError, match="at least 2"):
        PixelMap.from_marks([[0, 0]], [[0, 0]])


def test_read_marks_and_input_log_errors(tmp_path):
    m = tmp_path / "marks.csv"
    m.write_text("x_px,y_px,x [um],y [um]\n0,0,0,0\n100,0,65,0\n")
    px, ws = read_marks(m)
    assert ws[1, 0] == pytest.approx(65e-6) and px[1, 0] == 100
    bad = tmp_path / "bad.csv"
    bad.write_text("time [s],primitive,coil_1 [A]\n0,a,1\n0,b,2\n")
    with pytest.raises(InputLogError, match=r"bad.csv:3: log times must be finite and increase"):
        read_input_log(bad)
    nounit = tmp_path / "nounit.csv"
    nounit.write_text("time [s],primitive,coil_1\n0,a,1\n")
    with pytest.raises(InputLogError, match="'coil_1' is read as a channel but has no unit"):
        read_input_log(nounit)
    sched = tmp_path / "sched.csv"
    fieldplan.Schedule.from_segments((fieldplan.Channel("coil_1", "A", -2, 2),),
                                     [fieldplan.Segment(0, 0.5, [1.0], "p1"), fieldplan.Segment(0.5, 0.5, [0.0], "idle")]
                                     ).write_csv(sched)
    log = read_input_log(sched)
    assert log.primitive == ["p1", "idle"] and log.end == pytest.approx(1.0)
    assert list(log.at([0.1, 0.6, 1.2, -0.1])) == [0, 1, -1, -1]


def test_trackpy_defaults_from_the_body():
    s = trackpy_settings("1 um", "0.5 um")
    assert s["diameter"] % 2 == 1 and s["diameter"] >= 3 * 2
    assert s["search_range"] == pytest.approx(4.0)
    with pytest.raises(VideoError, match="> 0"):
        trackpy_settings(0, "0.5 um")


def test_tiff_stack_to_tracks_subpixel_and_identity_through_a_crossing(tmp_path):
    truth = crossing_paths()
    stack = render_stack((80, 96), truth, sigma=1.5, rng=1)
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, np.clip(stack, 0, 65535).astype(np.uint16))
    log = write_log(tmp_path / "log.csv", [(0.0, "push", 1.0), (1.0, "idle", 0.0)])
    out = tmp_path / "tracks.csv"
    res = track_video(path, settings=log, fps=FPS, pixel_size=PX, radius="1 um", search_range=5, out=out,
                      warn=False)
    assert [r["track"] for r in res.report] and len(res.report) == 2, res.report
    assert all(not r["lost"] and r["frames_missing"] == 0 and r["swaps"] == 0 for r in res.report)
    # identity: each recovered track follows one truth body over all 40 frames, through the crossing
    errs = []
    for r in res.report:
        sel = res.raw.track == r["track"]
        xy_px = res.raw.xy[sel] / PX
        frames = np.round(res.raw.time[sel] * FPS).astype(int)
        d = [np.linalg.norm(xy_px - truth[frames, i], axis=1) for i in range(2)]
        i = int(np.argmin([np.max(x) for x in d]))
        errs.append(d[i])
        assert len(frames) == 40
    errs = np.concatenate(errs)
    rms = float(np.sqrt(np.mean(errs**2)))
    print(f"\ntrackpy on the synthetic stack: RMS position error {rms:.3f} px, worst {errs.max():.3f} px")
    assert rms < 0.1 and errs.max() < 0.3                          # sub-pixel (SNR 40 spots)
    # the file is the tracking CSV fieldplan fit reads; the log split it at t = 1 s
    data = read_tracks(out, warn=False)
    assert set(data.primitives) == {"push", "idle"} and data.channels == (("coil_1", "A"),)
    assert data.primitive_values["push"] == (1.0,)
    np.testing.assert_allclose(np.sort(data.time)[:2], [0.0, 0.0])


def test_lost_body_and_dropped_frames_are_reported_per_track(tmp_path):
    truth = crossing_paths(30)
    truth[10:13, 0] = np.nan                       # body 0 not visible for 3 frames
    truth[20:, 1] = np.nan                         # body 1 leaves for good at frame 20
    stack = render_stack((80, 96), truth, rng=2)
    log = write_log(tmp_path / "log.csv", [(0.0, "push", 1.0)])
    res = track_video("synthetic", frames=stack, settings=log, fps=FPS, pixel_size=PX, radius="1 um",
                      search_range=5, memory=4, warn=False)
    by_first = sorted(res.report, key=lambda r: -r["frames_seen"])
    kept, lost = by_first[0], by_first[1]
    assert kept["frames_missing"] == 3 and not kept["lost"]
    assert lost["lost"] and lost["last_frame"] == 19
    kinds = [i.kind for i in res.issues]
    assert kinds.count("missing") == 3


def test_identity_swap_in_a_trackpy_table_is_reported(tmp_path):
    """A trackpy table in which the two particle ids swap at frame 15: the reader's jump check names it."""
    pd = pytest.importorskip("pandas")
    k = np.arange(30)
    rows = []
    for f in k:
        a, b = (10 + 1.0 * f, 20.0), (10 + 1.0 * f, 60.0)
        pa, pb = (0, 1) if f < 15 else (1, 0)
        rows += [(f, a[0], a[1], pa), (f, b[0], b[1], pb)]
    df = pd.DataFrame(rows, columns=["frame", "x", "y", "particle"])
    table = tmp_path / "tp.csv"
    df.to_csv(table, index=False)
    log = write_log(tmp_path / "log.csv", [(0.0, "push", 1.0)])
    res = tracks_from_table(table, settings=log, fps=10, pixel_size="1 um", out=tmp_path / "t.csv", warn=False)
    assert sum(r["swaps"] for r in res.report) == 2
    assert {i.kind for i in res.issues} >= {"jump"}
    with pytest.raises(VideoError, match="'particle'"):
        tracks_from_table(df.drop(columns="particle"), settings=log, fps=10, pixel_size="1 um")
    with pytest.raises(VideoError, match="outside|inside the input log"):
        late = write_log(tmp_path / "late.csv", [(100.0, "push", 1.0)])
        tracks_from_table(df, settings=late, fps=10, pixel_size="1 um")


def test_frames_from_video_files_and_errors(tmp_path):
    iio = pytest.importorskip("imageio.v3")
    stack = render_stack((32, 40), crossing_paths(5) * 0.4, rng=3)
    gif = tmp_path / "clip.gif"
    iio.imwrite(gif, np.clip(stack, 0, 255).astype(np.uint8))
    frames = list(read_frames(gif))
    assert len(frames) == 5 and frames[0][1].shape == (32, 40)
    with pytest.raises(VideoError, match="not found"):
        list(read_frames(tmp_path / "nope.tif"))


# -- calibration from a synthetic video ------------------------------------------------------------
SOURCES = [[0.0, 0.0], [1e-3, 0.0], [0.0, 1e-3], [1e-3, 1e-3]]
BEAD = fieldplan.Body("bead", radius=2e-6, density=1100.0)
WATER = fieldplan.water()


def test_calibration_from_a_synthetic_video_recovers_the_truth_fields(tmp_path):
    """Video of 40 beads under two primitives -> tracks -> fitted fields within 8 % RMS of the truth
    where data are dense (the dense-data threshold of tests/calibration/test_calibrate.py)."""
    truth = SourceArray(SOURCES, force=1e-12, core=3e-4, affine=False, extent=(0, 1e-3, 0, 1e-3))
    rng = np.random.default_rng(3)
    starts = rng.uniform([1e-4, 1e-4], [5e-4, 9e-4], (40, 2))
    program = [("p1", [1, 0, 0, 0], 5.0), ("p4", [0, 0, 0, 1], 5.0)]
    sim = synthetic_tracks(truth, BEAD, WATER, starts, program, noise=0.0, rng=4)
    T = int(round(10.0 / 0.1))
    xy = np.full((T, 40, 2), np.nan)
    ids = np.array([int(s[1:]) for s in sim.track])
    xy[np.round(sim.time / 0.1).astype(int), ids] = sim.xy
    # camera: 5 um/px, rotated 0.2 rad, placed so every bead is in view; fitted from three marks
    A = PixelMap.from_scale("5 um", rotation=0.2).matrix[:, :2]
    lowest = np.nanmin(np.linalg.solve(A, xy.reshape(-1, 2).T).T, axis=0)
    cam = PixelMap(np.column_stack([A, A @ (lowest - 12.0)]))
    frames_px = cam.inverse(xy.reshape(-1, 2)).reshape(xy.shape)
    size = np.ceil(np.nanmax(frames_px.reshape(-1, 2), axis=0) + 12).astype(int)
    marks_px = np.array([[20.0, 30.0], [380.0, 40.0], [60.0, 520.0]])
    pm = PixelMap.from_marks(marks_px, cam(marks_px))
    assert np.nanmin(frames_px) >= 11.9
    stack = render_stack((int(size[1]), int(size[0])), frames_px, sigma=1.0, amplitude=150.0, noise=4.0, rng=5)
    log = write_log(tmp_path / "log.csv", [(0.0, "p1", 1, 0, 0, 0), (5.0, "p4", 0, 0, 0, 1)],
                    channels=("s0 [1]", "s1 [1]", "s2 [1]", "s3 [1]"))
    out = tmp_path / "tracks.csv"
    res = track_video("synthetic", frames=stack, settings=log, fps=10, pixel_map=pm, radius=BEAD.radius,
                      search_range=2, count=40, out=out, warn=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        samples = velocity_samples(read_tracks(out, warn=False), warn=False)
    print(f"\nvideo calibration: {len(res.report)} tracks, {res.summary()['swaps']} swaps, position noise "
          f"{samples.position_noise * 1e6:.3f} um")
    fit = fit_field(samples)
    gx, gy = np.meshgrid(np.linspace(1.5e-4, 4.5e-4, 15), np.linspace(1.5e-4, 8.5e-4, 15))
    dense = np.column_stack([gx.ravel(), gy.ravel()])
    for name, u in (("p1", [1, 0, 0, 0]), ("p4", [0, 0, 0, 1])):
        f = fit.get(name)
        v_fit = f(dense)
        v_true = truth.velocity(BEAD, WATER, dense, np.asarray(u, float))
        rel = float(np.sqrt(np.mean(np.sum((v_fit - v_true) ** 2, axis=1)) / np.mean(np.sum(v_true**2, axis=1))))
        print(f"  {name}: relative RMS error {100 * rel:.2f} % on the dense grid")
        assert rel < 0.08, (name, rel)
    assert os.path.getsize(out) > 1000


def test_trackpy_hdf5_table(tmp_path):
    """HDF5 tables are read with pandas.read_hdf, which needs PyTables (skipped without it)."""
    pd = pytest.importorskip("pandas")
    pytest.importorskip("tables", reason="PyTables is not installed: pandas cannot read HDF5 trackpy tables")
    k = np.arange(20)
    df = pd.DataFrame({"frame": np.r_[k, k], "x": np.r_[10 + k, 10 + k], "y": np.r_[20 + 0 * k, 60 + 0 * k],
                       "particle": np.r_[0 * k, 0 * k + 1]})
    h5 = tmp_path / "tp.h5"
    df.to_hdf(h5, key="tracks")
    log = write_log(tmp_path / "log.csv", [(0.0, "push", 1.0)])
    res = tracks_from_table(h5, settings=log, fps=10, pixel_size="1 um", warn=False)
    assert len(res.report) == 2 and all(r["frames_seen"] == 20 for r in res.report)
