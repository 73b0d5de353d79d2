"""Vibrating plate: forced response, drift law, tones, the disk cache and the actuator contract
(the plate modes themselves: tests/actuators/test_plate_modes.py).

Sources are named beside each check (see shared CHECKS.md):
Leissa = A. W. Leissa, Vibration of Plates, NASA SP-160 (1969).
"""

import os
import pickle

import matplotlib
import numpy as np
import pytest
from scipy.constants import g as GRAVITY

import fieldplan
from fieldplan.actuators import acoustic
from fieldplan.actuators.acoustic import (
    DEFAULT_MOBILITY,
    Plate,
    drift_law,
    hop_gate,
    hop_threshold,
    plot_drift,
    plot_modes,
    plot_response,
    tone_set,
)
from fieldplan.actuators.plate_modes import flexural_rigidity, plate_modes
from fieldplan import ActuatorError, Body, FieldplanError
from fieldplan.contract.testing import check_actuator

AL = dict(youngs_modulus=69e9, poisson_ratio=0.3, density=2700.0)
A = 0.2          # m, side of the square plates
H = 1e-3         # m
SAND = Body("sand", radius=2.5e-4, density=2600.0)
BALL = Body("steel-ball", radius=1e-3, density=7800.0, drift_mobility=10.0)
AIR = fieldplan.air()
WATER = fieldplan.water()


def modes(edges, n, a=A, b=A, supports=(), **kw):
    return plate_modes(a, b, H, AL["youngs_modulus"], AL["poisson_ratio"], AL["density"], edges,
                       supports, n, **kw)


def lam2_scale(a=A):
    """omega -> lambda^2 = omega a^2 sqrt(rho h / D)."""
    d = flexural_rigidity(H, AL["youngs_modulus"], AL["poisson_ratio"])
    return a**2 * np.sqrt(AL["density"] * H / d)


@pytest.fixture(scope="module")
def ss_plate(tmp_path_factory):
    """Simply supported 0.3 m x 0.2 m plate, force at a generic point, light damping."""
    return Plate(0.3, 0.2, H, **AL, edges="SSSS", drive_point=(0.037, -0.021), damping=0.002,
                 band=(50.0, 2000.0), n_tones=8, cache_dir=tmp_path_factory.mktemp("ss"))


def test_forced_response_peaks_at_the_modal_frequencies(ss_plate):
    """Modal superposition with modal damping; a single-degree-of-freedom displacement response
    peaks at omega_n sqrt(1 - 2 zeta^2) (textbook SDOF result, from memory). Checked for the
    first four (well separated) modes of the rectangle to 3e-4, well inside the half-power
    bandwidth 2 zeta = 4e-3."""
    m = ss_plate.modes
    probe = np.array([[-0.061, 0.043]])
    zeta = ss_plate.damping
    for k in range(4):
        fn = m.frequencies[k]
        f = fn * np.linspace(1 - 15 * zeta, 1 + 15 * zeta, 6001)
        h = np.abs(ss_plate.frequency_response(f, probe)[:, 0])
        assert 0 < np.argmax(h) < len(f) - 1
        np.testing.assert_allclose(f[np.argmax(h)], fn * np.sqrt(1 - 2 * zeta**2), rtol=3e-4)
        # and it is a peak: well above the response a few bandwidths away
        assert h.max() > 5 * max(h[0], h[-1])


def test_forced_response_at_resonance_has_the_mode_shape(ss_plate):
    """Modal superposition: at omega = omega_n the n-th term is larger than the others by about
    1 / (2 zeta), so the deflection pattern is that mode's shape (derived)."""
    m = ss_plate.modes
    x0, x1, y0, y1 = ss_plate.extent
    X, Y = np.meshgrid(np.linspace(x0, x1, 41), np.linspace(y0, y1, 31))
    xy = np.column_stack([X.ravel(), Y.ravel()])
    phi = m.shape(xy)
    for k in range(4):
        w = ss_plate.deflection(m.frequencies[k], 1.0, xy)
        corr = abs(np.vdot(phi[:, k], w)) / (np.linalg.norm(phi[:, k]) * np.linalg.norm(w))
        assert corr > 0.999, (k, corr)
        # and the plate velocity and acceleration follow i omega w and -omega^2 w
        om = 2 * np.pi * m.frequencies[k]
        np.testing.assert_allclose(ss_plate.surface_velocity(m.frequencies[k], 1.0, xy[:3]), 1j * om * w[:3])
        np.testing.assert_allclose(ss_plate.surface_acceleration(m.frequencies[k], 1.0, xy[:3]), -om**2 * w[:3])


def test_base_drive_moves_the_plate_with_its_support_at_low_frequency(tmp_path):
    """Base excitation, derived: w = u_b [1 + omega^2 sum phi Gamma / (omega_m^2 - omega^2 ...)]
    tends to rigid motion with the support (w -> u_b) far below the first resonance, and the
    gain is the support displacement per drive unit."""
    plate = Plate(A, A, H, **AL, edges="CCCC", excitation="base", gain=2e-6, band=(1.0, 500.0),
                  tones=[(300.0, 1.0)], cache_dir=tmp_path)
    xy = np.array([[0.0, 0.0], [0.05, 0.03]])
    w = plate.deflection(1.0, 1.0, xy)
    first = plate.modes.frequencies[0]
    assert first > 200
    np.testing.assert_allclose(w, 2e-6, rtol=3 * (1.0 / first) ** 2 + 1e-9)


# ------------------------------------------------------------------------------------------
# drift law
# ------------------------------------------------------------------------------------------
def test_hop_threshold_at_500_hz():
    """CHECKS.md, bouncing-ball criterion [pub]: a grain hops where omega^2 |w| > g;
    500 Hz -> threshold amplitude 0.9936 um."""
    np.testing.assert_allclose(hop_threshold(500.0), 0.9936e-6, rtol=1e-4)
    np.testing.assert_allclose(hop_threshold(500.0), GRAVITY / (2 * np.pi * 500.0) ** 2, rtol=1e-14)


def test_hop_gate_stops_grains_below_threshold_in_air(ss_plate):
    """Bouncing-ball criterion [pub]: in air nothing moves where the plate's acceleration is
    below g; under liquid there is no such threshold (Phys. Rev. Lett. 122, 184301, 2019)."""
    f = ss_plate.modes.frequencies[0]
    x0, x1, y0, y1 = ss_plate.extent
    X, Y = np.meshgrid(np.linspace(x0, x1, 25), np.linspace(y0, y1, 17))
    xy = np.column_stack([X.ravel(), Y.ravel()])
    peak = np.max(np.abs(ss_plate.frequency_response([f], xy)))
    for factor, moves in ((0.95, False), (1.5, True)):
        amp = factor * hop_threshold(f) / peak
        v_air = ss_plate.drift(SAND, AIR, xy, f, amp)
        v_water = ss_plate.drift(SAND, WATER, xy, f, amp)
        assert (np.max(np.abs(v_air)) > 0) == moves
        assert np.max(np.abs(v_water)) > 0
    # The gate is a C1 ramp: 0 at Gamma = 1, 1 from 1 + width on.
    assert hop_gate(1.0) == 0 and hop_gate(1.2) == 1 and 0 < hop_gate(1.1) < 1


def test_drift_toward_nodal_line_in_air_and_away_under_liquid(tmp_path):
    """Faraday, Phil. Trans. 121 (1831) [pub]: in air heavy grains collect on nodal lines;
    Phys. Rev. Lett. 122, 184301 (2019) [pub]: on a submerged plate heavy beads go to antinodes.
    Mode (2,1) of a simply supported square has its nodal line on x = 0; a grain 10 mm beside
    it must move toward it in air and away from it under water. The drive point lies on the
    mirror line y = 0, so on that line the drift is purely across the nodal line."""
    m = modes("SSSS", 3)
    f21 = m.frequencies[1]
    plate = Plate(A, A, H, **AL, edges="SSSS", drive_point=(-A / 4, 0.0), band=(100.0, 1000.0),
                  tones=[(f21, 1.0)], max_amplitude=10.0, cache_dir=tmp_path)
    peak = np.max(np.abs(plate.deflection(f21, 1.0, [[-A / 4, 0.0]])))
    amp = 30e-6 / peak              # 30 um at the antinode
    for side in (+1, -1):
        xy = np.array([[side * 0.01, 0.0]])
        assert np.abs(plate.deflection(f21, amp, xy))[0] > 1.3 * hop_threshold(f21)  # grains hop here
        v_air = plate.drift(SAND, AIR, xy, f21, amp)[0]
        v_wet = plate.drift(SAND, WATER, xy, f21, amp)[0]
        assert np.sign(v_air[0]) == -side and np.sign(v_wet[0]) == side
        assert abs(v_air[1]) < 1e-6 * abs(v_air[0])


def test_drift_law_units_and_mobility():
    """The law's definition (module docstring): v = s mu omega G grad|w|^2; linear in mu.
    Default mu gives mm/s to cm/s for 20 um at 1 kHz (PHYSICS-NOTES ranges, from memory)."""
    grad = np.array([[2.5e-8, 0.0]])              # ~ |w|^2 k for |w| = 20 um, k = 64 rad/m
    omega = 2 * np.pi * 1000.0
    v = drift_law(omega, np.array([(20e-6) ** 2]), grad, DEFAULT_MOBILITY, submerged=False)
    np.testing.assert_allclose(v[0, 0], -DEFAULT_MOBILITY * omega * grad[0, 0])
    assert 1e-3 < abs(v[0, 0]) < 1e-1
    v2 = drift_law(omega, np.array([(20e-6) ** 2]), grad, 2 * DEFAULT_MOBILITY, submerged=True)
    np.testing.assert_allclose(v2, -2 * v)


# ------------------------------------------------------------------------------------------
# the actuator
# ------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def centre_plate(tmp_path_factory):
    """Square aluminium plate pinned at its centre on a post that a shaker moves (base drive)."""
    return Plate(A, A, H, **AL, edges="free", supports=[(0.0, 0.0)], excitation="base",
                 band=(150.0, 1200.0), n_tones=16, cache_dir=tmp_path_factory.mktemp("centre"))


@pytest.fixture(scope="module")
def offset_plate(tmp_path_factory):
    """The same plate driven by a point force off every symmetry line."""
    return Plate(A, A, H, **AL, edges="free", drive_point=(0.031, 0.047), band=(150.0, 1200.0),
                 n_tones=16, cache_dir=tmp_path_factory.mktemp("offset"))


def test_contract_suite_passes(centre_plate, offset_plate):
    """fieldplan.contract.testing.check_actuator: the actuator contract."""
    for plate in (centre_plate, offset_plate):
        check_actuator(plate, [SAND, BALL], AIR)
        check_actuator(plate, [SAND], WATER)
    assert {"discrete_channels", "zero_idle"} <= centre_plate.tags
    assert "affine_in_input" not in centre_plate.tags


def test_channels_and_tones(centre_plate):
    """Frequency channel lists the tones; every excitable resonance in the band is a tone;
    generated amplitudes reach the target peak displacement unless capped."""
    freq, amp = centre_plate.channels
    assert freq.unit == "Hz" and freq.values and amp.unit == "V" and amp.lower == 0
    res = centre_plate.resonances()
    assert 0 < len(res) < centre_plate.n_tones
    for f in res:
        assert np.any(np.isclose(freq.values, f, rtol=1e-12))
    for row in centre_plate.tone_table():
        assert row["peak_displacement"] <= 20e-6 * (1 + 1e-9)
        assert np.isclose(row["peak_displacement"], 20e-6) or np.isclose(row["amplitude"], centre_plate.max_amplitude)
    assert len(centre_plate.primitives()) == centre_plate.n_tones


def test_tone_set_places_resonances_and_midpoints():
    """Tones at each resonance and at geometric midpoints of the widest gaps (definition)."""
    t = tone_set([300.0, 700.0, 5000.0], (100.0, 2000.0), 6)
    assert len(t) == 6 and np.all((t >= 100) & (t <= 2000)) and np.all(np.diff(t) > 0)
    assert 300.0 in t and 700.0 in t and 5000.0 not in t
    assert np.any(np.isclose(t, np.sqrt(700.0 * 2000.0)))
    many = tone_set(np.linspace(200, 900, 30), (100.0, 1000.0), 5)
    assert len(many) == 5 and np.all(np.isin(many, np.linspace(200, 900, 30)))


def test_grid_interpolation_matches_direct_modal_evaluation(centre_plate, tmp_path):
    """The cached grid (Keys cubic convolution) against direct modal evaluation: the basis
    fields agree to 1 % of the largest (common practice, no source: interpolation error)."""
    direct = Plate(A, A, H, **AL, edges="free", supports=[(0.0, 0.0)], excitation="base",
                   band=(150.0, 1200.0), n_tones=16, cache_dir=tmp_path, use_grid=False)
    xy = np.random.default_rng(5).uniform(-0.095, 0.095, (30, 2))
    bodies = [SAND, BALL] * 15
    for medium in (AIR, WATER):
        fg = centre_plate.basis(bodies, medium, xy).fields
        fd = direct.basis(bodies, medium, xy).fields
        assert np.max(np.abs(fg - fd)) < 1e-2 * np.max(np.abs(fd))


def test_basis_agrees_with_velocity_for_each_tone(offset_plate):
    """The fast basis override equals velocity(primitive) per body (contract, definition)."""
    xy = np.random.default_rng(6).uniform(-0.09, 0.09, (5, 2))
    bodies = [SAND, BALL, SAND, BALL, SAND]
    b = offset_plate.basis(bodies, AIR, xy)
    for k, p in enumerate(offset_plate.primitives()):
        for i, body in enumerate(bodies):
            np.testing.assert_allclose(b.fields[k, i], offset_plate.velocity(body, AIR, xy[i:i + 1], p.values)[0],
                                       rtol=1e-12, atol=1e-18)


def test_body_mobility_scales_the_drift(offset_plate):
    """Definition: v is linear in mu; Body.drift_mobility overrides the plate default."""
    xy = np.array([[0.02, -0.03], [-0.05, 0.01]])
    u = offset_plate.primitives()[3].values
    v_default = offset_plate.velocity(SAND, AIR, xy, u)
    custom = Body("sand", radius=2.5e-4, density=2600.0, drift_mobility=3 * DEFAULT_MOBILITY)
    np.testing.assert_allclose(offset_plate.velocity(custom, AIR, xy, u), 3 * v_default)


def test_centre_drive_has_mirror_symmetric_fields(centre_plate, offset_plate):
    """PHYSICS-NOTES, symmetry: a square plate driven at its centre excites only modes symmetric
    about it, so fields are mirror images at mirror points; an off-centre drive breaks this."""
    m = centre_plate.modes
    x0, x1, y0, y1 = centre_plate.extent
    pts = np.random.default_rng(7).uniform(x0, x1, (15, 2))
    for k in centre_plate.excitable_modes():
        phi = m.shape(pts, [k])[:, 0]
        scale = np.max(np.abs(phi))
        for mirror in (pts * [-1, 1], pts * [1, -1], pts[:, ::-1]):
            np.testing.assert_allclose(m.shape(mirror, [k])[:, 0], phi, atol=1e-6 * scale)
    elastic = np.count_nonzero(m.omega > 0)
    assert len(centre_plate.excitable_modes()) < elastic / 3

    def asymmetry(plate):
        p = pts[:6]
        n = len(p)
        f = plate.basis([SAND] * 4 * n, AIR, np.vstack([p, p * [-1, 1], p * [1, -1], p[:, ::-1]])).fields
        v, vx, vy, vd = f[:, :n], f[:, n:2 * n], f[:, 2 * n:3 * n], f[:, 3 * n:]
        err = [np.abs(vx - v * [-1, 1]), np.abs(vy - v * [1, -1]), np.abs(vd - v[..., ::-1])]
        return max(e.max() for e in err) / np.max(np.abs(f))

    assert asymmetry(centre_plate) < 1e-5
    assert asymmetry(offset_plate) > 1e-2


def test_speeds_in_the_expected_range(centre_plate):
    """PHYSICS-NOTES ranges (from memory): grains on a demonstration plate move at mm/s to cm/s;
    with the default mobility the fastest points of each tone are in 0.1 mm/s .. 10 cm/s."""
    x0, x1, y0, y1 = centre_plate.extent
    X, Y = np.meshgrid(np.linspace(x0, x1, 31), np.linspace(y0, y1, 31))
    xy = np.column_stack([X.ravel(), Y.ravel()])
    f = centre_plate.basis([SAND] * len(xy), AIR, xy).fields
    top = np.max(np.hypot(f[..., 0], f[..., 1]), axis=1)
    assert np.median(top) > 1e-4 and np.max(top) < 0.1


# ------------------------------------------------------------------------------------------
# disk cache
# ------------------------------------------------------------------------------------------
def test_cache_reload_does_not_recompute(tmp_path, monkeypatch):
    """A second plate with the same parameters loads modes and grids from disk (written
    atomically: no temporary files remain); a changed parameter makes a new entry."""
    kw = dict(**AL, edges="free", drive_point=(0.02, 0.01), band=(150.0, 900.0), n_tones=6, cache_dir=tmp_path)
    first = Plate(A, A, H, **kw).prepare()
    names = sorted(os.listdir(tmp_path))
    assert len(names) == 2 and all(n.endswith(".npz") for n in names)
    assert not [n for n in names if n.startswith(".")]

    def boom(*a, **k):
        raise AssertionError("recomputed although cached")

    monkeypatch.setattr(acoustic, "plate_modes", boom)
    monkeypatch.setattr(Plate, "_build_grid", boom)
    second = Plate(A, A, H, **kw).prepare()
    xy = np.array([[0.01, 0.02], [-0.04, 0.03]])
    np.testing.assert_array_equal(first.basis([SAND, SAND], AIR, xy).fields, second.basis([SAND, SAND], AIR, xy).fields)
    monkeypatch.undo()
    Plate(A, A, H, **{**kw, "damping": 0.02}).prepare()
    assert len(os.listdir(tmp_path)) == 3          # same modes, new grid
    # A pickled plate travels without its arrays and reloads them.
    assert len(pickle.dumps(second)) < 20000


def test_cache_directory_from_environment(tmp_path, monkeypatch):
    """FIELDPLAN_CACHE chooses the cache directory when cache_dir is not given."""
    monkeypatch.setenv("FIELDPLAN_CACHE", str(tmp_path / "env-cache"))
    assert acoustic.cache_directory() == tmp_path / "env-cache"
    assert acoustic.cache_directory(tmp_path / "x") == tmp_path / "x"
    assert acoustic.cache_directory(False) is None
    Plate(A, A, H, **AL, edges="SSSS", band=(100.0, 600.0), n_tones=3).prepare()
    assert len(os.listdir(tmp_path / "env-cache")) == 2


def test_corrupt_cache_entry_is_recomputed(tmp_path):
    kw = dict(**AL, edges="SSSS", band=(100.0, 600.0), n_tones=3, cache_dir=tmp_path)
    Plate(A, A, H, **kw).prepare()
    for n in os.listdir(tmp_path):
        (tmp_path / n).write_bytes(b"not a cache file")
    plate = Plate(A, A, H, **kw).prepare()
    assert np.all(np.isfinite(plate.basis([SAND], AIR, [[0.01, 0.01]]).fields))


# ------------------------------------------------------------------------------------------
# bad input
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs, match", [
    (dict(thickness=-1e-3), "thickness"),
    (dict(poisson_ratio=0.5), "poisson_ratio"),
    (dict(poisson_ratio=0.7), "poisson_ratio"),
    (dict(tones=[(6000.0, 1.0)]), "outside the declared band"),
    (dict(tones=[(300.0, 50.0)]), "amplitude"),
    (dict(edges="XFFF"), "edge"),
    (dict(supports=[(0.5, 0.0)]), "supports"),
    (dict(supports=[(0.0, 0.0, "clamped")]), "radius"),
    (dict(drive_point=(0.3, 0.0)), "drive_point"),
    (dict(excitation="base"), "supports or a clamped"),
    (dict(damping=0.0), "damping"),
    (dict(band=(500.0, 100.0)), "band"),
    (dict(material="unobtainium"), "material"),
    (dict(length_x="20 kg"), "length_x: '20 kg' has dimension"),
])
def test_bad_plate_parameters_raise_clear_errors(kwargs, match):
    base = dict(length_x=A, length_y=A, thickness=H, cache_dir=False)
    # ActuatorError, or UnitError for a value with the wrong unit (both FieldplanError, ValueError)
    with pytest.raises(FieldplanError, match=match):
        Plate(**{**base, **kwargs})


def test_thick_plate_warns_that_thin_plate_theory_fails():
    """Kirchhoff theory needs bending wavelength >> thickness (common practice, no source: ten
    thicknesses)."""
    with pytest.warns(RuntimeWarning, match="Kirchhoff"):
        Plate(A, A, 0.02, band=(100.0, 5000.0), cache_dir=False)


def test_bad_calls_raise(offset_plate):
    xy = np.array([[0.0, 0.01]])
    freq = offset_plate.channels[0]
    with pytest.raises(ActuatorError, match="outside its bounds"):
        offset_plate.velocity(SAND, AIR, xy, [6000.0, 1.0])
    with pytest.raises(ActuatorError, match="not one of its allowed"):
        offset_plate.velocity(SAND, AIR, xy, [0.5 * (freq.values[0] + freq.values[1]), 1.0])
    with pytest.raises(ActuatorError, match="outside the declared band"):
        offset_plate.drift(SAND, AIR, xy, 10.0, 1.0)
    with pytest.raises(ActuatorError, match="poisson_ratio"):
        plate_modes(A, A, H, 69e9, 0.5, 2700.0, "free", n_modes=3)
    with pytest.raises(ActuatorError, match="thickness"):
        plate_modes(A, A, -H, 69e9, 0.3, 2700.0, "free", n_modes=3)


def test_units_as_strings(tmp_path):
    """Parameters accept unit strings (parsed by fieldplan.units.to_si)."""
    p = Plate("200 mm", "0.2 m", "1 mm", youngs_modulus="69 GPa", edges="SSSS", band=("100 Hz", "0.6 kHz"),
              n_tones=3, cache_dir=tmp_path)
    assert p.length_x == pytest.approx(0.2) and p.band == (pytest.approx(100.0), pytest.approx(600.0))
    assert p.youngs_modulus == pytest.approx(69e9)


# ------------------------------------------------------------------------------------------
# plots
# ------------------------------------------------------------------------------------------
def test_plots_return_labelled_figures(centre_plate, tmp_path):
    fig = plot_modes(centre_plate.modes, count=4, columns=2)
    assert isinstance(fig, matplotlib.figure.Figure)
    labels = [ax.get_xlabel() for ax in fig.axes]
    assert "x (mm)" in labels and any("peak" in ax.get_ylabel() for ax in fig.axes)  # colour bar
    fig2 = plot_drift(centre_plate, SAND, AIR, tone=2)
    assert any("mm/s" in ax.get_ylabel() for ax in fig2.axes) and any("µm" in ax.get_ylabel() for ax in fig2.axes)
    fig3 = plot_response(centre_plate, [[0.05, 0.03]], n=200)
    assert "Hz" in fig3.axes[0].get_xlabel()
    for k, f in enumerate((fig, fig2, fig3)):
        f.savefig(tmp_path / f"p{k}.png", dpi=50)
        matplotlib.pyplot.close(f)
    assert all((tmp_path / f"p{k}.png").stat().st_size > 1000 for k in range(3))


# ---------------------------------------------------------------------------------------------
# residual flexibility of the truncated modes (force drive)
# ---------------------------------------------------------------------------------------------
def test_tail_profile_matches_quadrature():
    """tau(s) = int_1^inf J0(s q) q^-3 dq in closed form [derived: two integrations by parts and
    int_s^inf J0(t)/t dt = -gamma - ln(s/2) + int_0^s (1 - J0(t))/t dt, Abramowitz & Stegun 11.1.20],
    against direct quadrature, and its derivative against a central difference."""
    from scipy import integrate, special
    s = np.array([0.0, 1e-4, 5e-4, 2e-3, 0.3, 1.0, 2.5, 7.0, 20.0])
    tau, dtau = acoustic._tail_profile(s)
    assert tau[0] == 0.5 and dtau[0] == 0.0
    for si, ti in zip(s[1:], tau[1:]):
        # Split at 1 + 60/s, beyond which the Bessel asymptote's integral is below 1e-7.
        top = 1.0 + 2000.0 / max(si, 1.0)
        ref = integrate.quad(lambda q: special.j0(si * q) / q**3, 1.0, top, limit=4000, epsabs=1e-12)[0]
        assert ti == pytest.approx(ref, abs=2e-7)
    h = 1e-5
    for si in (0.3, 1.0, 7.0):
        num = (acoustic._tail_profile(np.array([si + h]))[0] - acoustic._tail_profile(np.array([si - h]))[0]) / (2 * h)
        assert acoustic._tail_profile(np.array([si]))[1][0] == pytest.approx(num[0], rel=1e-6)


def _small_plate(margin, **kw):
    # A 120 x 100 mm aluminium plate, tones to 1.5 kHz: modes to 12 kHz still take about a second.
    return Plate(0.12, 0.1, 1e-3, edges="free", band=(100.0, 1500.0), n_tones=8, mode_margin=margin,
                 cache_dir=False, **kw)


FORCE = dict(excitation="force", drive_point=(0.02, 0.013))


def _without_residual(plate):
    bare = _small_plate(plate.mode_margin, **FORCE)
    bare._state = plate._state

    def zero(freqs, xy, gradient=False):
        z = np.zeros((len(np.atleast_1d(freqs)), len(np.atleast_2d(xy))))
        return (z, z, z) if gradient else z
    bare._residual = zero
    return bare


@pytest.fixture(scope="module")
def force_plates():
    return _small_plate(2.0, **FORCE), _small_plate(8.0, **FORCE)


def _between_resonances(plate, f):
    fm = plate.modes.frequencies[plate.modes.omega > 0]
    return f[np.all(np.abs(f[:, None] / fm[None, :] - 1.0) > 0.03, axis=1)]


def test_drive_point_tail_is_the_infinite_plate_mobility(force_plates):
    """At the drive point the residual is F / (4 pi sqrt(D rho h) omega_c) at low frequency: the
    modal density of the plate (Weyl: A k^2 / 4 pi modes below k) times the mean of phi^2, which
    is 1/(rho h A) for mass-normalised modes. Checked on this plate's own modes between 4 and
    12 kHz, and the density equals that behind the infinite plate's point mobility
    1/(8 sqrt(D rho h)) (Cremer & Heckl, Structure-Borne Sound) [pub]: pi n(omega) <phi^2> / 2."""
    p2, p8 = force_plates
    d = flexural_rigidity(1e-3, p2.youngs_modulus, p2.poisson_ratio)
    rho_h = p2.density * 1e-3
    wc = 2 * np.pi * p2._mode_frequency_limit()
    low = p2._residual([1e-3 * p2._mode_frequency_limit()], np.array([p2.drive_point]))[0, 0]
    assert low == pytest.approx(1.0 / (4 * np.pi * np.sqrt(d * rho_h) * wc), rel=1e-6)
    m = p8.modes
    sel = (m.frequencies > p2._mode_frequency_limit()) & (m.frequencies <= p8._mode_frequency_limit())
    phi2 = m.shape(np.array([p2.drive_point]))[0][sel] ** 2
    assert np.mean(phi2) == pytest.approx(1.0 / (rho_h * 0.012), rel=0.25)
    density = 0.012 / (4 * np.pi) * np.sqrt(rho_h / d)                # modes per rad/s
    assert np.pi * density / (rho_h * 0.012) / 2 == pytest.approx(1.0 / (8 * np.sqrt(d * rho_h)), rel=1e-12)
    count = np.sum(m.omega[m.omega > 0] <= 2 * np.pi * p8._mode_frequency_limit())
    assert count == pytest.approx(density * 2 * np.pi * p8._mode_frequency_limit(), rel=0.25)


def test_drive_point_receptance_converges_with_the_residual(force_plates):
    """Drive-point receptance between resonances (3 % clear of every mode): modes to twice the top
    tone against modes to eight times it (both with the residual, the converged reference).
    Without the residual the median error is about 23 %; with it about 2 %."""
    p2, p8 = force_plates
    f = _between_resonances(p8, np.linspace(120.0, 1500.0, 300))
    xd = np.array([p2.drive_point])
    ref = p8.frequency_response(f, xd)[:, 0]
    err = np.abs(p2.frequency_response(f, xd)[:, 0] / ref - 1)
    err_bare = np.abs(_without_residual(p2).frequency_response(f, xd)[:, 0] / ref - 1)
    assert np.median(err_bare) > 0.1
    assert np.median(err) < 0.04 and np.median(err) < np.median(err_bare) / 5
    # The reference itself moves little when its own residual is dropped: 8x is nearly converged.
    err_ref = np.abs(_without_residual(p8).frequency_response(f, xd)[:, 0] / ref - 1)
    assert np.median(err_ref) < np.median(err_bare)


def test_gradient_of_squared_amplitude_converges_near_the_drive(force_plates):
    """grad |w|^2 = 2 Re(conj(w) grad w) on circles of 2 and 10 mm round the drive point, the
    quantity the drift law uses: with the residual the median error against the 8x reference is
    about 2.5 %, without it about 30 %."""
    p2, p8 = force_plates
    f = _between_resonances(p8, np.linspace(120.0, 1500.0, 300))[::10]
    ang = np.linspace(0.0, 2 * np.pi, 8, endpoint=False)
    for radius in (2e-3, 10e-3):
        pts = np.array(p2.drive_point) + radius * np.column_stack([np.cos(ang), np.sin(ang)])

        def grad_amp2(plate):
            return np.array([2 * np.real(np.conj(plate.deflection(fi, 1.0, pts))[:, None]
                                         * plate.deflection_gradient(fi, 1.0, pts)) for fi in f])
        ref = grad_amp2(p8)
        scale = np.linalg.norm(ref, axis=2)
        err = np.median(np.linalg.norm(grad_amp2(p2) - ref, axis=2) / scale)
        err_bare = np.median(np.linalg.norm(grad_amp2(_without_residual(p2)) - ref, axis=2) / scale)
        assert err < 0.06 and err < err_bare / 4, (radius, err, err_bare)
    # The interpolated tone grid carries the residual too.
    p2.prepare()
    xy = np.array(p2.drive_point) + np.array([[3e-3, 1e-3], [-6e-3, 4e-3]])
    exact = p2._exact_samples(p2._state["frequencies"], xy)
    grid = p2._state["grid"].sample(xy).reshape(exact.shape)
    # Deflection and gradient columns each to 2e-3 of their peak (interpolation error); the residual
    # is about 0.7 % of the deflection and 0.9 % of the gradient there, so a grid without it fails.
    for cols in (slice(0, 2), slice(2, 6)):
        np.testing.assert_allclose(grid[..., cols], exact[..., cols], rtol=0, atol=2e-3 * np.max(np.abs(exact[..., cols])))


def test_base_drive_converges_without_a_residual():
    """A base drive loads the plate uniformly; its high modes hardly take part. Modes to 2x the
    top tone against 4x, away from resonances: the response over a few points agrees to about
    0.3 % (median), so no residual is added for it."""
    base = dict(excitation="base", supports=[(0.0, 0.0)])
    b2, b4 = _small_plate(2.0, **base), _small_plate(4.0, **base)
    f = _between_resonances(b4, np.linspace(120.0, 1500.0, 200))
    pts = np.array([[0.02, 0.013], [-0.04, 0.03], [0.05, -0.04]])
    h2, h4 = b2.frequency_response(f, pts), b4.frequency_response(f, pts)
    err = np.linalg.norm(h2 - h4, axis=1) / np.linalg.norm(h4, axis=1)
    assert np.median(err) < 0.01
    assert not np.any(b2._residual(f, pts))
