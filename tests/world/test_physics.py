import numpy as np
import pytest
from scipy.constants import Boltzmann

from fieldplan import Body, FieldplanError, water
from fieldplan.world.physics import (
    _bispherical_parallel,
    diffusion_coefficient,
    drag_coefficient,
    faxen_parallel,
    inertial_relaxation_time,
    reynolds_number,
    stokes_drag,
    wall_drag_parallel,
    wall_resistance_parallel,
)


def test_stokes_einstein_one_micron_sphere():
    # CHECKS.md [pub]: Stokes-Einstein, d = 1 um at 20 degC -> D = 0.4288 um^2/s.
    bead = Body("bead", radius=0.5e-6, density=1050.0, height=1.0)
    d = diffusion_coefficient(bead, water(293.15), wall=False)
    assert d == pytest.approx(0.4288e-12, rel=5e-4, abs=0)
    assert d == pytest.approx(Boltzmann * 293.15 / stokes_drag(0.5e-6, water(293.15).viscosity), rel=1e-12, abs=0)


def test_faxen_factor_at_twice_the_radius():
    # CHECKS.md [pub] (Faxen; Happel & Brenner): h/r = 2 -> D_par/D0 = 0.72144.
    assert faxen_parallel(1.0, 2.0) == pytest.approx(0.72144, abs=5e-6)
    assert faxen_parallel(1e-6, 1.0) == pytest.approx(1.0, abs=1e-5)


def test_faxen_warns_below_validity_limit():
    # Happel & Brenner: the series is not valid below h/r ~ 1.1; we clip and warn.
    with pytest.warns(RuntimeWarning, match="validity"):
        f = faxen_parallel(1.0, 1.01)
    assert f == pytest.approx(faxen_parallel(1.0, 1.1))


def test_wall_reduces_diffusion():
    # At h/r = 2 the exact torque-free mobility (O'Neill 1964 with Dean & O'Neill 1963) is 0.72322;
    # Faxen's series (0.72144, Happel & Brenner) is 0.25 % low there.
    bead = Body("bead", radius=1e-6, density=1050.0, height=2e-6)
    w = water()
    ratio = diffusion_coefficient(bead, w) / diffusion_coefficient(bead, w, wall=False)
    assert ratio == pytest.approx(1.0 / wall_drag_parallel(1.0, 2.0), rel=1e-12)
    assert ratio == pytest.approx(0.72144, rel=3e-3)
    assert ratio * drag_coefficient(bead, w) == pytest.approx(stokes_drag(1e-6, w.viscosity), rel=1e-12, abs=0)


# O'Neill, Mathematika 11, 67 (1964), Table 1, as reproduced in Goldman, Cox & Brenner,
# Chem. Eng. Sci. 22, 637 (1967), Table 1: drag F*/(6 pi eta r U) on a sphere translating parallel
# to a wall without rotating, at h/r = cosh(alpha). Values from memory (four decimals as tabulated),
# not re-read from the papers; the computed series matches every one to the last digit.
ONEILL_1964 = [(3.0, 1.0591), (2.0, 1.1738), (1.0, 1.5675), (0.5, 2.1515), (0.3, 2.6475),
               (0.1, 3.7863), (0.08, 4.0223)]


@pytest.mark.parametrize("alpha, f_tt", ONEILL_1964)
def test_translation_coefficient_matches_oneill_table(alpha, f_tt):
    # h/r from 10.07 down to 1.0032 (gap 0.32 % of the radius).
    assert wall_drag_parallel(1.0, np.cosh(alpha), "fixed") == pytest.approx(f_tt, abs=6e-5)


@pytest.mark.parametrize("gap", [3e-3, 1e-3, 1e-4, 1e-5])
def test_near_contact_asymptotics(gap):
    """Goldman, Cox & Brenner (1967), eqs. 2.65 and 3.13, gap delta = (h - r)/r -> 0 [pub]:
    f_tt ~ -(8/15) ln delta + 0.9588, t_tt ~ -(1/10) ln delta - 0.1895,
    f_tr ~ -(2/15) ln delta - 0.2526, t_rr ~ -(2/5) ln delta + 0.3817 (magnitudes).
    Their constants were fitted to O'Neill's numbers; the matched-asymptotic constants of O'Neill &
    Stewartson (J. Fluid Mech. 27, 705, 1967) and Cooley & O'Neill (1969), 0.9543, -0.2573 and
    0.3709 (from memory), agree with the series to O(delta ln delta)."""
    f_tt, t_tt, f_tr, t_rr = wall_resistance_parallel(1.0, 1.0 + gap)
    L = -np.log(gap)
    assert f_tt == pytest.approx(8 / 15 * L + 0.9588, abs=6e-3)
    assert t_tt == pytest.approx(L / 10 - 0.1895, abs=6e-3)
    assert f_tr == pytest.approx(2 / 15 * L - 0.2526, abs=6e-3)
    assert t_rr == pytest.approx(2 / 5 * L + 0.3817, abs=1.2e-2)
    tight = 20 * gap * L + 1e-4                      # O(delta ln delta) remainder
    assert f_tt == pytest.approx(8 / 15 * L + 0.9543, abs=tight)
    assert f_tr == pytest.approx(2 / 15 * L - 0.2573, abs=tight)
    assert t_rr == pytest.approx(2 / 5 * L + 0.3709, abs=tight)
    # The torque-free drag follows from the same published resistances [derived].
    free_asym = (8 / 15 * L + 0.9543) - (2 / 15 * L - 0.2573) * (3 / 4) * (2 / 15 * L - 0.2573) / (2 / 5 * L + 0.3709)
    assert wall_drag_parallel(1.0, 1.0 + gap) == pytest.approx(free_asym, abs=2 * tight)


@pytest.mark.parametrize("ratio", [1.003, 1.01, 1.1, 1.5, 2.0, 4.0, 10.0])
def test_series_is_converged_and_reciprocal(ratio):
    """Doubling the truncation changes nothing; Lorentz reciprocity (Happel & Brenner, ch. 5):
    the coupling resistance is symmetric, R_FOmega = R_TU, i.e. 6 f_tr = 8 t_tt in this
    normalisation, which ties the translation (O'Neill 1964) and rotation (Dean & O'Neill 1963)
    series together although they are computed separately."""
    f_tt, t_tt, f_tr, t_rr = wall_resistance_parallel(1.0, ratio)
    assert t_tt == pytest.approx(0.75 * f_tr, rel=1e-9, abs=1e-15)
    doubled = _bispherical_parallel(ratio - 1.0, reach=80.0)
    np.testing.assert_allclose(doubled, (f_tt, t_tt, f_tr, t_rr), rtol=1e-12, atol=1e-14)


@pytest.mark.parametrize("ratio", [10.0, 20.0, 99.0, 101.0, 1e4])
def test_far_field_matches_faxen(ratio):
    """Faxen's series (Happel & Brenner) is exact to O((r/h)^6) far from the wall; the rotation
    resistance tends to 1 + (5/16)(r/h)^3 (Goldman, Cox & Brenner 1967, far-field form)."""
    f_tt, t_tt, f_tr, t_rr = wall_resistance_parallel(1.0, ratio)
    assert f_tt == pytest.approx(1.0 / faxen_parallel(1.0, ratio), rel=2 * ratio**-6)
    assert t_rr == pytest.approx(1.0 + 5.0 / 16.0 * ratio**-3, rel=2 * ratio**-5)
    assert wall_drag_parallel(1.0, ratio) == pytest.approx(f_tt, rel=1e-7)


def test_drag_at_one_percent_gap_is_not_the_clipped_faxen_value():
    """Issue 13: at h = 1.01 r the old clipped Faxen factor gave 2.36; the exact non-rotating value
    is 3.42 (O'Neill 1964 series; GCB asymptote 3.415) and the torque-free one 3.38."""
    assert 1.0 / faxen_parallel(1.0, 1.1) == pytest.approx(2.3603, abs=1e-4)
    assert wall_drag_parallel(1.0, 1.01, "fixed") == pytest.approx(-8 / 15 * np.log(0.01) + 0.9588, abs=1e-2)
    assert 3.3 < wall_drag_parallel(1.0, 1.01) < wall_drag_parallel(1.0, 1.01, "fixed")


def test_free_rotation_is_less_resisted_and_monotone():
    ratios = np.concatenate([1 + np.logspace(-6, 0, 25), [3.0, 10.0, 50.0, 200.0]])
    free = np.array([wall_drag_parallel(1.0, r) for r in ratios])
    fixed = np.array([wall_drag_parallel(1.0, r, "fixed") for r in ratios])
    assert np.all(free <= fixed) and np.all(free >= 1.0)
    assert np.all(np.diff(free) < 0) and np.all(np.diff(fixed) < 0)


def test_fixed_moment_bodies_slide_others_roll():
    w = water()
    bead = Body("bead", 1e-6, 1050.0, gap=1e-8)
    magnet = Body("magnet", 1e-6, 7500.0, gap=1e-8, moment=(0, 0, 1e-12))
    assert drag_coefficient(bead, w) == pytest.approx(stokes_drag(1e-6, w.viscosity) * wall_drag_parallel(1e-6, bead.height),
                                                      rel=1e-12, abs=0)
    assert drag_coefficient(magnet, w) == pytest.approx(stokes_drag(1e-6, w.viscosity)
                                                        * wall_drag_parallel(1e-6, magnet.height, "fixed"), rel=1e-12, abs=0)
    assert drag_coefficient(magnet, w) > 1.01 * drag_coefficient(bead, w)        # gap 1e-2 r: 3.42 against 3.38


def test_wall_resistance_rejects_contact():
    with pytest.raises(FieldplanError, match="gap"):
        wall_resistance_parallel(1.0, 1.0)
    with pytest.raises(FieldplanError, match="rotation"):
        wall_drag_parallel(1.0, 2.0, rotation="rolling")


def test_regime_numbers():
    bead = Body("bead", radius=1e-6, density=1000.0)
    w = water()
    # Re = rho v d / eta; tau = 2 rho_p r^2 / (9 eta): closed forms.
    assert reynolds_number(1e-5, 1e-6, w) == pytest.approx(w.density * 1e-5 * 2e-6 / w.viscosity)
    assert inertial_relaxation_time(bead, w) == pytest.approx(2 * 1000 * 1e-12 / (9 * w.viscosity))


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(radius=-1e-6, density=1000.0), "radius"),
    (dict(radius=1e-6, density=0.0), "density"),
    (dict(radius=1e-6, density=1000.0, height=0.5e-6), "inside the floor"),
    (dict(radius=1e-6, density=1000.0, moment=(1, 2)), "moment"),
    (dict(radius=1e-6, density=1000.0, susceptibility=float("nan")), "susceptibility"),
])
def test_bad_bodies(kwargs, fragment):
    with pytest.raises(FieldplanError, match=fragment):
        Body("b", **kwargs)
    assert np.isfinite(Body("ok", 1e-6, 1000.0).height)


def test_regime_warnings_flag_inertia_and_reynolds():
    # CHECKS.md [common practice]: Re << 1 and tau << period for the overdamped model.
    from fieldplan.world.physics import regime_warnings
    w = water()
    bead = Body("bead", 1e-6, 1050.0)
    assert regime_warnings([bead], w, 1e-4, 0.1) == []
    big = Body("ball", 1e-3, 7800.0)
    msgs = regime_warnings([big], w, 1e-2, 0.05)
    assert any("Reynolds" in m for m in msgs) and any("relaxation" in m for m in msgs)
