"""Tests of fieldplan.calibration.calibrate: field recovery, coverage, the calibrated actuator, its files, grey-box fits.

The "truth" in these tests is the analytic test actuator fieldplan.contract.testing.SourceArray; tracking data
are invented from it with fieldplan.calibration.tracking.synthetic_tracks. Error thresholds are stated in each
test (common practice, no source: a few times the noise-limited error for the sample counts used).
"""

from __future__ import annotations

import json
import os
import pickle
import warnings

import numpy as np
import pytest

import fieldplan
from fieldplan.calibration.calibrate import (
    CalibratedActuator,
    CalibrationError,
    CalibrationWarning,
    FieldFit,
    calibrate_command,
    fit_field,
    fit_parameters,
    load_calibrated,
    plot_coverage,
    plot_residuals,
    plot_vectors,
)
from fieldplan.calibration.tracking import TrackingDataError, synthetic_tracks, velocity_samples, write_tracks
from fieldplan.contract.testing import SourceArray, check_actuator
from fieldplan.errors import ActuatorError

FULL = os.environ.get("FIELDPLAN_FULL") == "1"
SOURCES = [[0.0, 0.0], [1e-3, 0.0], [0.0, 1e-3], [1e-3, 1e-3]]
BEAD = fieldplan.Body("bead", radius=2e-6, density=1100.0)
WATER = fieldplan.water()


def truth(force=1e-12, core=3e-4, sources=SOURCES):
    return SourceArray(sources, force=force, core=core, affine=False, extent=(0, 1e-3, 0, 1e-3))


PROGRAM = [("p1", [1, 0, 0, 0], 8.0), ("p4", [0, 0, 0, 1], 8.0)]


def grid(x0, x1, y0, y1, n=15):
    gx, gy = np.meshgrid(np.linspace(x0, x1, n), np.linspace(y0, y1, n))
    return np.column_stack([gx.ravel(), gy.ravel()])


def rel_rms(a, b):
    """RMS of the vector error over RMS of the true speed."""
    return float(np.sqrt(np.mean(np.sum((a - b) ** 2, axis=1)) / np.mean(np.sum(b**2, axis=1))))


@pytest.fixture(scope="module")
def dense_sparse():
    """Many tracks in the left part of the dish, three in the right part (invented data)."""
    rng = np.random.default_rng(3)
    starts = np.vstack([rng.uniform([1e-4, 1e-4], [5e-4, 9e-4], (40, 2)),
                        rng.uniform([6e-4, 1e-4], [9e-4, 9e-4], (3, 2))])
    data = synthetic_tracks(truth(), BEAD, WATER, starts, PROGRAM, noise=0.3e-6, rng=4)
    samples = velocity_samples(data)
    return samples, fit_field(samples)


# -- recovery and coverage ---------------------------------------------------------------------
def test_recovery_dense_and_sparse(dense_sparse):
    """Known field + noise -> fitted field within 8 % RMS of the truth where data are dense (and
    within the reported CV error); the error is at least twice as large where data are sparse,
    and coverage and the per-point standard error show it."""
    samples, fit = dense_sparse
    act = CalibratedActuator(fit)
    dense = grid(1.5e-4, 4.5e-4, 1.5e-4, 8.5e-4)
    sparse = grid(6.5e-4, 8.5e-4, 1.5e-4, 8.5e-4)
    for name, u, _ in PROGRAM:
        f = fit.get(name, "bead")
        e_dense = rel_rms(act.velocity(BEAD, WATER, dense, u), truth().velocity(BEAD, WATER, dense, u))
        e_sparse = rel_rms(act.velocity(BEAD, WATER, sparse, u), truth().velocity(BEAD, WATER, sparse, u))
        abs_dense = e_dense * np.sqrt(np.mean(np.sum(truth().velocity(BEAD, WATER, dense, u) ** 2, axis=1)))
        assert e_dense < 0.08, (name, e_dense)
        assert abs_dense < f.cv_rmse                      # CV error also holds the noise, so it bounds this
        assert e_sparse > 2.0 * e_dense, (name, e_dense, e_sparse)
        c_dense, c_sparse = act.coverage(dense, name), act.coverage(sparse, name)
        assert np.mean(c_dense) > 0.8 and np.mean(c_sparse) < 0.4
        assert np.all((c_dense >= 0) & (c_dense <= 1))
        assert np.mean(act.uncertainty(sparse, name)) > 1.5 * np.mean(act.uncertainty(dense, name))
        # CV error sits just above the noise floor for a well-sampled smooth field
        assert f.noise_rms < f.cv_rmse < 1.5 * f.noise_rms
    far = act.coverage([[3e-3, 3e-3]])
    assert far[0] < 1e-6


def test_uncertainty_is_calibrated_where_dense(dense_sparse):
    """Where data are dense (bias small), the per-component standard error predicts the actual
    error: RMS of (error / stderr) is about 1 (between 0.5 and 2)."""
    samples, fit = dense_sparse
    f = fit.get("p1", "bead")
    pts = grid(1.5e-4, 4.5e-4, 2e-4, 8e-4, 12)
    err = f(pts) - truth().velocity(BEAD, WATER, pts, [1, 0, 0, 0])
    z = err / f.uncertainty(pts)[:, None]
    assert 0.5 < np.sqrt(np.mean(z**2)) < 2.0


def test_fit_report_and_table(dense_sparse):
    samples, fit = dense_sparse
    rows = fit.report()
    assert [r["primitive"] for r in rows] == ["p1", "p4"]
    for r in rows:
        assert r["cv_grouping"] == "track" and r["cv_folds"] == 5
        assert r["n_samples"] == int(np.sum(samples.primitive == r["primitive"]))
        assert 0 < r["cv_relative"] < 0.3
    assert "CV rmse" in fit.table()


def test_noise_free_field_is_nearly_exact():
    """With no noise the cross-validation picks little smoothing and the field is close to the truth."""
    starts = np.random.default_rng(5).uniform(1.5e-4, 8.5e-4, (40, 2))
    data = synthetic_tracks(truth(), BEAD, WATER, starts, PROGRAM[:1], noise=0.0, rng=6)
    fit = fit_field(velocity_samples(data))
    pts = grid(3e-4, 7e-4, 3e-4, 7e-4)
    assert rel_rms(fit.fields[0](pts), truth().velocity(BEAD, WATER, pts, [1, 0, 0, 0])) < 0.02


def test_too_few_samples_warns_naming_primitive_and_tracks():
    starts = np.random.default_rng(7).uniform(2e-4, 8e-4, (10, 2))
    program = [("long", [1, 0, 0, 0], 8.0), ("brief", [0, 1, 0, 0], 1.0)]
    samples = velocity_samples(synthetic_tracks(truth(), BEAD, WATER, starts, program, noise=2e-7, rng=8))
    with pytest.warns(CalibrationWarning, match=r"primitive 'brief', body kind 'bead': 10 velocity sample\(s\)"
                                                 r" from 10 segment\(s\) \(tracks \['b0'"):
        fit = fit_field(samples)
    assert fit.primitives == ["long"] and "brief" in fit.skipped[0]
    with pytest.warns(CalibrationWarning), pytest.raises(CalibrationError, match="no primitive has enough"):
        fit_field(samples, min_samples=1000)
    with pytest.raises(CalibrationError, match=r"primitive\(s\) \['nope'\] are not in the data"):
        fit_field(samples, primitives=["nope"])
    with pytest.raises(CalibrationError, match="folds must be >= 2"):
        fit_field(samples, folds=1)


# -- the calibrated actuator -----------------------------------------------------------------------
def test_actuator_contract_and_settings(dense_sparse):
    samples, fit = dense_sparse
    act = CalibratedActuator(fit)
    check_actuator(act, [BEAD], WATER)
    assert [p.name for p in act.primitives()] == ["p1", "p4"]
    assert [c.name for c in act.channels] == ["source_1", "source_2", "source_3", "source_4"]
    assert act.channels[0].values == (0.0, 1.0) and act.tags == {"discrete_channels", "zero_idle"}
    np.testing.assert_array_equal(act.velocity(BEAD, WATER, [[5e-4, 5e-4]], [0, 0, 0, 0]), 0.0)
    np.testing.assert_allclose(act.velocity(BEAD, WATER, [[3e-4, 4e-4]], [1, 0, 0, 0]),
                               fit.get("p1", "bead")([[3e-4, 4e-4]]))
    with pytest.raises(ActuatorError, match="not a calibrated setting.*'p1', 'p4'"):
        act.velocity(BEAD, WATER, [[3e-4, 4e-4]], [1, 0, 0, 1])
    with pytest.raises(ActuatorError, match="not one of its allowed values"):
        act.velocity(BEAD, WATER, [[3e-4, 4e-4]], [0.5, 0, 0, 0])
    other = fieldplan.Body("cell", radius=5e-6, density=1050.0)
    with pytest.raises(ActuatorError, match="no calibration for body kind 'cell'.*\\['bead'\\]"):
        act.velocity(other, WATER, [[3e-4, 4e-4]], [1, 0, 0, 0])
    pos = np.array([[3e-4, 4e-4], [8e-4, 5e-4]])            # dense side, sparse side
    basis = act.basis([BEAD, BEAD], WATER, pos)
    assert basis.mode == "timeshare" and basis.size == 2
    cov = basis.meta["coverage"]
    assert cov.shape == (2, 2) and np.all(cov[:, 0] > cov[:, 1])
    np.testing.assert_allclose(cov[1], act.coverage(pos, "p4", BEAD))
    np.testing.assert_array_equal(basis.meta["drift_coverage"], 1.0)      # idle velocity is zero by assumption


def test_primitive_only_data_and_idle_field(tmp_path):
    """Data naming settings only get one 'primitive' index channel; a recorded idle setting
    becomes the drift (velocity at the idle input)."""
    starts = np.random.default_rng(9).uniform(2e-4, 8e-4, (25, 2))
    program = [("a", [1, 0, 0, 0], 6.0), ("off", [0, 0, 0, 0], 6.0), ("b", [0, 1, 0, 0], 6.0)]
    data = synthetic_tracks(truth(), BEAD, WATER, starts, program, noise=2e-7, rng=10)
    data.channels = ()
    data.primitive_values = {k: () for k in data.primitive_values}
    data.kind[:] = None
    fit = fit_field(velocity_samples(data))
    act = CalibratedActuator(fit, idle_primitive="off")
    (ch,) = act.channels
    assert ch.name == "primitive" and ch.values == (1.0, 2.0) and ch.upper == 2.0
    assert [p.values for p in act.primitives()] == [(1.0,), (2.0,)]
    assert "zero_idle" not in act.tags
    other = fieldplan.Body("anything", radius=1e-6, density=1000.0)     # no kinds in data: any body
    np.testing.assert_allclose(act.velocity(other, WATER, [[5e-4, 5e-4]], [0.0]),
                               fit.get("off")([[5e-4, 5e-4]]))
    check_actuator(act, [BEAD, other], WATER)
    with pytest.raises(CalibrationError, match="idle primitive 'zzz' was not fitted"):
        CalibratedActuator(fit, idle_primitive="zzz")


def test_detects_all_zero_setting_as_idle():
    starts = np.random.default_rng(11).uniform(2e-4, 8e-4, (25, 2))
    program = [("a", [1, 0, 0, 0], 6.0), ("rest", [0, 0, 0, 0], 6.0)]
    fit = fit_field(velocity_samples(synthetic_tracks(truth(), BEAD, WATER, starts, program, noise=2e-7, rng=12)))
    act = CalibratedActuator(fit)
    assert act.idle_primitive == "rest" and [p.name for p in act.primitives()] == ["a"]
    basis = act.basis([BEAD], WATER, [[5e-4, 5e-4]])
    np.testing.assert_allclose(basis.drift, fit.get("rest", "bead")([[5e-4, 5e-4]]))
    check_actuator(act, [BEAD], WATER)


def test_save_load_round_trip(tmp_path, dense_sparse):
    samples, fit = dense_sparse
    act = CalibratedActuator(fit)
    json_path, npz_path = act.save(tmp_path / "cal", note="invented data")
    assert json_path.endswith("cal.json") and npz_path.endswith("cal.npz")
    assert not list(tmp_path.glob("*.tmp-*"))
    meta = json.loads(open(json_path).read())
    assert meta["format"] == "fieldplan.calibrated-actuator" and meta["version"] == 1
    assert meta["npz"] == "cal.npz" and [f["primitive"] for f in meta["fields"]] == ["p1", "p4"]
    with np.load(npz_path) as z:
        assert z["field0_xy"].shape == (fit.fields[0].n_samples, 2)
    back = load_calibrated(tmp_path / "cal.json")
    pts = grid(1e-4, 9e-4, 1e-4, 9e-4, 8)
    for name, u, _ in PROGRAM:
        np.testing.assert_allclose(back.velocity(BEAD, WATER, pts, u), act.velocity(BEAD, WATER, pts, u),
                                   rtol=1e-9, atol=1e-18)
        np.testing.assert_allclose(back.coverage(pts, name), act.coverage(pts, name), rtol=1e-12)
    assert back.channels == act.channels and back.extent == act.extent and back.tags == act.tags
    clone = pickle.loads(pickle.dumps(back))
    np.testing.assert_array_equal(clone.velocity(BEAD, WATER, pts, [1, 0, 0, 0]),
                                  back.velocity(BEAD, WATER, pts, [1, 0, 0, 0]))


def test_load_rejects_mismatched_or_foreign_files(tmp_path, dense_sparse):
    act = CalibratedActuator(dense_sparse[1])
    act.save(tmp_path / "a")
    act.save(tmp_path / "b")
    os.replace(tmp_path / "b.npz", tmp_path / "a.npz")   # same content, still consistent
    CalibratedActuator.load(tmp_path / "a")
    with open(tmp_path / "a.npz", "ab") as fh:
        fh.write(b"x")
    with pytest.raises(CalibrationError, match="does not match.*different calibration runs"):
        CalibratedActuator.load(tmp_path / "a.json")
    (tmp_path / "c.json").write_text(json.dumps({"format": "something-else"}))
    with pytest.raises(CalibrationError, match="format is 'something-else'"):
        CalibratedActuator.load(tmp_path / "c.json")
    with pytest.raises(CalibrationError, match="not found"):
        CalibratedActuator.load(tmp_path / "missing")


# -- plots -----------------------------------------------------------------------------------------
def test_plots_have_units_and_colour_bars(dense_sparse):
    samples, fit = dense_sparse
    for fn in (plot_vectors, plot_residuals, plot_coverage):
        fig = fn(fit)
        axes = [a for a in fig.axes if a.get_visible() and a.get_label() != "<colorbar>"]
        main = [a for a in axes if a.get_xlabel()]
        assert len(main) == 2
        assert all(a.get_xlabel() == "x [µm]" and a.get_ylabel() == "y [µm]" for a in main)
        if fn is not plot_vectors:
            bars = [a for a in fig.axes if a.get_label() == "<colorbar>"]
            assert len(bars) == 2 and "[" in bars[0].get_ylabel()
        assert all(a.get_legend() is not None for a in main)


# -- grey-box fits -----------------------------------------------------------------------------------
def _greybox_rep(seed, names, true, initial, factory, brownian=False, n_tracks=6, hold=3.6):
    g = np.random.default_rng(seed)
    starts = g.uniform(1e-4, 9e-4, (n_tracks, 2))
    program = [("a", [1, 0, 0, 0], hold), ("b", [0, 0, 0, 1], hold)]
    data = synthetic_tracks(factory(**dict(zip(names, true))), BEAD, WATER, starts, program, noise=0.3e-6,
                            brownian=brownian, rng=g)
    s = velocity_samples(data)
    r95 = fit_parameters(factory, names, initial, s, BEAD, WATER)
    r50 = fit_parameters(factory, names, initial, s, BEAD, WATER, confidence=0.5)
    t = np.asarray(true)
    return (r95.lower < t) & (t < r95.upper), (r50.lower < t) & (t < r50.upper), r95


def _source_factory(force, core):
    return truth(force=force, core=core)


def test_greybox_interval_coverage():
    """Linearised Student-t intervals (s^2 (J^T J)^-1, 2N - p dof; Seber & Wild, Nonlinear
    Regression, 1989, ch. 5, from memory) contain the truth in >= 90 % of 40 seeded repetitions at
    95 % confidence, and their 50 % intervals in 30-70 % (so they are not merely wide)."""
    names, true = ("force", "core"), (1e-12, 3e-4)
    hits95, hits50 = [], []
    for r in range(40):
        h95, h50, res = _greybox_rep(1000 + r, names, true, (0.7e-12, 2e-4), _source_factory)
        hits95.append(h95)
        hits50.append(h50)
        assert res.success and res.dof == 2 * res.n_samples - 2
    c95, c50 = np.mean(hits95, axis=0), np.mean(hits50, axis=0)
    assert np.all(c95 >= 0.9), c95
    assert np.all((c50 >= 0.3) & (c50 <= 0.7)), c50


@pytest.mark.slow
def test_greybox_interval_coverage_three_parameters_brownian():
    """Same coverage check with three parameters (force, core, one source's x position) and
    Brownian motion in the data; 200 repetitions with FIELDPLAN_FULL=1, 30 otherwise."""
    reps = 200 if FULL else 30

    def factory(force, core, sx):
        return truth(force=force, core=core, sources=[[sx, 0.0]] + SOURCES[1:])

    names, true = ("force", "core", "sx"), (1e-12, 3e-4, 0.0)
    hits = [_greybox_rep(5000 + r, names, true, (0.8e-12, 2.5e-4, 5e-5), factory, brownian=True, n_tracks=8)[0]
            for r in range(reps)]
    cov = np.mean(hits, axis=0)
    assert np.all(cov >= 0.9), cov


def test_greybox_estimates_and_errors():
    h95, _, res = _greybox_rep(77, ("force", "core"), (1e-12, 3e-4), (0.7e-12, 2e-4), _source_factory,
                               n_tracks=20)
    assert res.estimate[0] == pytest.approx(1e-12, rel=0.05) and res.estimate[1] == pytest.approx(3e-4, rel=0.1)
    assert 0.7 < res.residual_scale < 1.4          # noise estimate from the tracks explains the residuals
    assert set(res.as_dict()) == {"force", "core"} and "95% interval" in res.table()
    starts = np.random.default_rng(0).uniform(2e-4, 8e-4, (5, 2))
    s = velocity_samples(synthetic_tracks(truth(), BEAD, WATER, starts, PROGRAM, noise=2e-7, rng=1))
    with pytest.raises(CalibrationError, match="same non-zero length"):
        fit_parameters(_source_factory, ["force", "core"], [1e-12], s, BEAD, WATER)
    with pytest.raises(CalibrationError, match="rejected parameters"):
        fit_parameters(_source_factory, ["force", "core"], [1e-12, -1e-4], s, BEAD, WATER)
    with pytest.raises(CalibrationError, match="no Body given for kind 'bead'"):
        fit_parameters(_source_factory, ["force"], [1e-12], s, {"cell": BEAD}, WATER, fixed={"core": 3e-4})

    def unused(force, core, gain):               # gain has no effect: not identifiable
        return truth(force=force, core=core)

    with pytest.warns(CalibrationWarning, match=r"\['gain'\] are not identifiable"):
        r = fit_parameters(unused, ["force", "gain"], [1e-12, 1.0], s, BEAD, WATER, fixed={"core": 3e-4})
    assert np.isinf(r.stderr[1]) and np.isfinite(r.stderr[0])


def test_greybox_inputs_by_primitive_name():
    """Samples without channel columns are matched to the actuator's primitives by name."""
    act = SourceArray(SOURCES, force=1e-12, core=3e-4, affine=True)
    names = {p.name: p.values for p in act.primitives()}        # 'source_1+' etc.
    starts = np.random.default_rng(2).uniform(2e-4, 8e-4, (8, 2))
    program = [("source_1+", names["source_1+"], 5.0), ("source_4-", names["source_4-"], 5.0)]
    data = synthetic_tracks(act, BEAD, WATER, starts, program, noise=2e-7, rng=3)
    data.channels = ()
    s = velocity_samples(data)
    res = fit_parameters(lambda force: SourceArray(SOURCES, force=force, core=3e-4), ["force"], [2e-12], s,
                         [BEAD], WATER)
    assert res.lower[0] < 1e-12 < res.upper[0]
    s.primitive[:] = "mystery"
    s.primitive_values = {"mystery": ()}
    with pytest.raises(CalibrationError, match=r"cannot tell which input primitives \['mystery'\]"):
        fit_parameters(lambda force: SourceArray(SOURCES, force=force, core=3e-4), ["force"], [2e-12], s,
                       BEAD, WATER)


# -- the whole command -------------------------------------------------------------------------------
def test_calibrate_command_end_to_end(tmp_path):
    starts = np.random.default_rng(13).uniform(1.5e-4, 8.5e-4, (20, 2))
    program = [("p1", [1, 0, 0, 0], 5.0), ("p4", [0, 0, 0, 1], 5.0), ("tiny", [0, 1, 0, 0], 0.6)]
    data = synthetic_tracks(truth(), BEAD, WATER, starts, program, noise=0.3e-6, rng=14)
    csv_path = tmp_path / "tracks.csv"
    write_tracks(csv_path, data, comment="invented data")
    with pytest.warns(CalibrationWarning, match="'tiny'"):
        report = calibrate_command(csv_path, tmp_path / "out", name="cal", min_samples=30)
    for key in ("actuator", "arrays", "report"):
        assert os.path.exists(report[key])
    assert set(report["plots"]) == {"vectors", "residuals", "coverage"}
    assert all(os.path.getsize(p) > 1000 for p in report["plots"].values())
    assert [f["primitive"] for f in report["fields"]] == ["p1", "p4"]
    assert report["skipped"] and any("tiny" in w for w in report["warnings"])
    saved = json.loads(open(report["report"]).read())
    assert saved["fields"][0]["cv_rmse_m_per_s"] == pytest.approx(report["fields"][0]["cv_rmse_m_per_s"])
    act = load_calibrated(report["actuator"])
    check_actuator(act, [BEAD], WATER)
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(TrackingDataError, match="empty"):
        calibrate_command(tmp_path / "empty.csv", tmp_path / "out2")
    assert not (tmp_path / "out2").exists()
    with pytest.raises(CalibrationError, match="plain file stem"):
        calibrate_command(csv_path, tmp_path / "out", name="../x")


def test_demo_data_is_labelled_and_calibrates(tmp_path):
    """The shipped demo CSV says it is invented, and its planted defects are reported."""
    path = os.path.join(os.path.dirname(__file__), "..", "..", "scenarios", "calibration", "tracks.csv")
    with open(path) as fh:
        assert "INVENTED DATA" in fh.readline()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        report = calibrate_command(path, tmp_path, plots=False, primitives=["pull_sw", "pull_ne"])
    issues = report["tracking"]["issues"]
    assert issues["jump"] == 1 and issues["outlier"] == 1 and issues["gap"] >= 3 and issues["missing"] >= 1
    assert [f["primitive"] for f in report["fields"]] == ["pull_sw", "pull_ne"]
    assert all(f["cv_relative"] < 0.3 for f in report["fields"])
    assert isinstance(CalibratedActuator.load(report["actuator"]).fit, FieldFit)


def test_shipped_fitted_actuator_matches_shipped_data():
    """scenarios/calibration/fitted was fitted from the shipped tracks.csv (checksum) and loads."""
    import hashlib

    here = os.path.join(os.path.dirname(__file__), "..", "..", "scenarios", "calibration")
    meta = json.loads(open(os.path.join(here, "fitted", "actuator.json")).read())
    digest = hashlib.sha256(open(os.path.join(here, "tracks.csv"), "rb").read()).hexdigest()
    assert meta["source"]["sha256"] == digest, "re-run `fieldplan fit` after regenerating tracks.csv"
    assert "INVENTED" in meta["note"]
    act = load_calibrated(os.path.join(here, "fitted", "actuator"))
    body = fieldplan.Body("bead-2um", radius=2e-6, density=1050.0)
    check_actuator(act, [body], WATER)
    assert act.idle_primitive == "idle" and len(act.primitives()) == 4


def test_greybox_body_parameter():
    """A body field (here the radius, through the Stokes/Faxen drag) is fitted like an actuator
    parameter; the 95 % interval contains the truth."""
    bead = fieldplan.Body("bead", radius=2e-6, density=1100.0, height=5e-6)
    starts = np.random.default_rng(21).uniform(2e-4, 8e-4, (10, 2))
    data = synthetic_tracks(truth(), bead, WATER, starts, PROGRAM, noise=0.3e-6, rng=22)
    s = velocity_samples(data)
    guess = fieldplan.Body("bead", radius=3e-6, density=1100.0, height=5e-6)
    res = fit_parameters(truth(), ["body.radius"], [3e-6], s, guess, WATER)
    assert res.lower[0] < 2e-6 < res.upper[0] and res.stderr[0] < 0.05e-6
    with pytest.warns(CalibrationWarning, match="density"):
        res2 = fit_parameters(_source_factory, ["force", "body[bead].density"], [1e-12, 1000.0], s, guess, WATER,
                              fixed={"core": 3e-4})
    assert np.isinf(res2.stderr[1])                 # density does not enter overdamped motion
    with pytest.raises(CalibrationError, match="need an actuator factory"):
        fit_parameters(truth(), ["force"], [1e-12], s, guess, WATER)
    with pytest.raises(CalibrationError, match="'body.colour'"):
        fit_parameters(truth(), ["body.colour"], [1.0], s, guess, WATER)


def test_greybox_built_in_magnetic_actuator():
    """Grey-box fit of a built-in actuator: the susceptibility of a soft bead pulled by a ring of
    four coils (actuators.magnetic.CoilArray, linear bead model F = V chi_eff / (2 mu0) grad|B|^2,
    Furlani 2001 per CHECKS.md) is recovered within its 95 % interval from invented tracks."""
    magnetic = pytest.importorskip("fieldplan.actuators.magnetic")
    coils = [magnetic.Coil((0.015 * np.cos(a), 0.015 * np.sin(a), -0.008), (0.0, 0.0, 1.0), 0.005, 250, 0.008,
                           layers=5, current_limit=2.0) for a in np.pi / 2 * np.arange(4)]
    arr = magnetic.CoilArray(coils, 0.0, bead_models="linear", extent=(-0.012, 0.012, -0.012, 0.012),
                             primitives="singles")
    soft = fieldplan.Body("soft-5um", radius=2.5e-6, density=1800.0, susceptibility=1.0)
    starts = np.random.default_rng(31).uniform(-0.008, 0.008, (12, 2))
    program = [(p.name, p.values, 5.0) for p in arr.primitives()[:2]]
    s = velocity_samples(synthetic_tracks(arr, soft, WATER, starts, program, noise=0.1e-6, rng=32))
    guess = fieldplan.Body("soft-5um", radius=2.5e-6, density=1800.0, susceptibility=0.5)
    res = fit_parameters(arr, ["body.susceptibility"], [0.5], s, guess, WATER, bounds=([1e-3], [50.0]))
    assert res.lower[0] < 1.0 < res.upper[0] and res.stderr[0] < 0.1
