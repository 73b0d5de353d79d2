import numpy as np
import pytest
from scipy.constants import Boltzmann

from fieldplan import Body, FieldplanError, water
from fieldplan.physics import (diffusion_coefficient, faxen_parallel, inertial_relaxation_time,
                               reynolds_number, stokes_drag)


def test_stokes_einstein_one_micron_sphere():
    # CHECKS.md [pub]: Stokes-Einstein, d = 1 um at 20 degC -> D = 0.4288 um^2/s.
    bead = Body("bead", radius=0.5e-6, density=1050.0, height=1.0)
    d = diffusion_coefficient(bead, water(293.15), wall=False)
    assert d == pytest.approx(0.4288e-12, rel=5e-4)
    assert d == pytest.approx(Boltzmann * 293.15 / stokes_drag(0.5e-6, water(293.15).viscosity), rel=1e-12)


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
    bead = Body("bead", radius=1e-6, density=1050.0, height=2e-6)
    w = water()
    assert diffusion_coefficient(bead, w) == pytest.approx(0.72144 * diffusion_coefficient(bead, w, wall=False), rel=1e-5)


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
    from fieldplan.physics import regime_warnings
    w = water()
    bead = Body("bead", 1e-6, 1050.0)
    assert regime_warnings([bead], w, 1e-4, 0.1) == []
    big = Body("ball", 1e-3, 7800.0)
    msgs = regime_warnings([big], w, 1e-2, 0.05)
    assert any("Reynolds" in m for m in msgs) and any("relaxation" in m for m in msgs)
