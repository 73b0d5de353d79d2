import pytest

from fieldplan import FieldplanError, Medium, air, water
from fieldplan.medium import water_viscosity


def test_water_viscosity_matches_iapws():
    # IAPWS R12-08 (0.1 MPa): 20 degC -> 1.0016 mPa s, 25 degC -> 0.89002 mPa s; to 0.1 %.
    assert water_viscosity(293.15) == pytest.approx(1.0016e-3, rel=1e-3)
    assert water_viscosity(298.15) == pytest.approx(0.89002e-3, rel=1e-3)
    assert water(298.15).viscosity == pytest.approx(0.89002e-3, rel=1e-3)


def test_water_density_and_permittivity_near_handbook_values():
    # Kell (1975): 998.2 kg/m^3 at 20 degC; Malmberg & Maryott (1956): eps_r 78.3 at 25 degC.
    assert water(293.15).density == pytest.approx(998.2, rel=1e-4)
    assert water(298.15).relative_permittivity == pytest.approx(78.3, rel=1e-3)


def test_air_viscosity_sutherland():
    # Sutherland's law with mu_ref = 1.716e-5 Pa s at 273.15 K; about 1.81e-5 Pa s at 20 degC
    # (handbook value, from memory).
    assert air(273.15).viscosity == pytest.approx(1.716e-5, rel=1e-12)
    assert air(293.15).viscosity == pytest.approx(1.81e-5, rel=1e-2)
    assert not air().submerged


def test_bad_medium_values():
    with pytest.raises(FieldplanError, match="viscosity"):
        Medium(viscosity=-1.0)
    with pytest.raises(FieldplanError, match="temperature"):
        water(400.0)
