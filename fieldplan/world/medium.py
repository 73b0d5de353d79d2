"""The fluid or gas around the bodies: viscosity, temperature, density, permittivity, conductivity."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import FieldplanError

__all__ = ["Medium", "water", "air", "water_viscosity", "water_density", "iapws_viscosity", "air_viscosity"]


#: IAPWS R12-08 reducing constants: temperature K, density kg/m^3, viscosity Pa s.
_IAPWS_T, _IAPWS_RHO, _IAPWS_MU = 647.096, 322.0, 1e-6
#: Coefficients H_i of the dilute-gas term (R12-08, Table 1).
_IAPWS_H0 = np.array([1.67752, 2.20462, 0.6366564, -0.241605])
#: Coefficients H_ij of the residual term (R12-08, Table 2); i indexes (1/T - 1)^i, j (rho - 1)^j.
_IAPWS_H1 = np.zeros((6, 7))
for (_i, _j), _v in {(0, 0): 5.20094e-1, (1, 0): 8.50895e-2, (2, 0): -1.08374, (3, 0): -2.89555e-1,
                     (0, 1): 2.22531e-1, (1, 1): 9.99115e-1, (2, 1): 1.88797, (3, 1): 1.26613,
                     (5, 1): 1.20573e-1, (0, 2): -2.81378e-1, (1, 2): -9.06851e-1, (2, 2): -7.72479e-1,
                     (3, 2): -4.89837e-1, (4, 2): -2.57040e-1, (0, 3): 1.61913e-1, (1, 3): 2.57399e-1,
                     (0, 4): -3.25372e-2, (3, 4): 6.98452e-2, (4, 5): 8.72102e-3, (3, 6): -4.35673e-3,
                     (5, 6): -5.93264e-4}.items():
    _IAPWS_H1[_i, _j] = _v
del _i, _j, _v


def iapws_viscosity(temperature, density):
    """Viscosity of water substance at a given temperature and density, IAPWS 2008 formulation.

    IAPWS R12-08, "Release on the IAPWS Formulation 2008 for the Viscosity of Ordinary Water
    Substance" (Huber et al., J. Phys. Chem. Ref. Data 38, 101, 2009): ``mu = mu0(T) mu1(T, rho)``
    with the dilute-gas term ``mu0 = 100 sqrt(T) / sum_i H_i / T^i`` and the residual term
    ``mu1 = exp(rho sum_ij H_ij (1/T - 1)^i (rho - 1)^j)`` in reduced units (T / 647.096 K,
    rho / 322 kg/m^3, mu / 1 uPa s). The critical enhancement ``mu2`` is taken as 1: the release
    gives it as significant only in a small region around the critical point, far from liquid
    water at atmospheric pressure.

    Parameters
    ----------
    temperature : float
        K (the release covers 253.15 K to 1173.15 K at the pressures of interest here).
    density : float
        kg/m^3.

    Returns
    -------
    float
        Pa s.

    Examples
    --------
    >>> round(iapws_viscosity(298.15, 998.0) * 1e6, 6)        # R12-08, Table 4
    889.7351
    """
    T, rho = float(temperature), float(density)
    if not (np.isfinite(T) and np.isfinite(rho) and T > 0 and rho > 0):
        raise FieldplanError(f"IAPWS viscosity: temperature and density must be positive, got {T!r} K, {rho!r} kg/m^3.")
    t, d = T / _IAPWS_T, rho / _IAPWS_RHO
    mu0 = 100.0 * np.sqrt(t) / np.sum(_IAPWS_H0 / t ** np.arange(4))
    powers = np.outer((1.0 / t - 1.0) ** np.arange(6), (d - 1.0) ** np.arange(7))
    mu1 = np.exp(d * np.sum(_IAPWS_H1 * powers))
    return float(mu0 * mu1 * _IAPWS_MU)


def water_density(temperature):
    """Density of air-free liquid water at atmospheric pressure, kg/m^3.

    Kell, J. Chem. Eng. Data 20, 97 (1975), valid 0-150 degC; within about 0.01 kg/m^3 (1e-5)
    of IAPWS-95 at 0.1 MPa between 0 and 100 degC (997.045 against 997.047 at 25 degC; the tests
    check 0, 25, 60, 80 and 95 degC against IAPWS-95 values recalled from memory, to 0.02 kg/m^3).

    Parameters
    ----------
    temperature : float
        K.

    Returns
    -------
    float
        kg/m^3.
    """
    t = float(temperature) - 273.15
    return (999.83952 + 16.945176 * t - 7.9870401e-3 * t**2 - 46.170461e-6 * t**3
            + 105.56302e-9 * t**4 - 280.54253e-12 * t**5) / (1.0 + 16.879850e-3 * t)


def water_viscosity(temperature):
    """Dynamic viscosity of liquid water at atmospheric pressure, IAPWS 2008.

    :func:`iapws_viscosity` (IAPWS R12-08) at the density :func:`water_density`. The Kell density
    is within about 1e-5 (relative) of IAPWS-95, and |d ln(mu) / d ln(rho)| stays below 2 for the
    liquid here (-0.35 at 25 degC, 1.9 at 95 degC), so the density moves the viscosity by about 2e-5 at most; the result carries the release's own
    uncertainty for the liquid at 0.1 MPa (stated in R12-08). Between 0.1 MPa and 101.325 kPa
    the difference is below 1e-6. The Kestin-Sokolov-Wakeham correlation used before was 0.26 %
    low at 60 degC, 1.1 % at 80 degC and 2.4 % at 95 degC.

    Parameters
    ----------
    temperature : float
        Kelvin, 273.15 to 373.15 (liquid water at atmospheric pressure).

    Returns
    -------
    float
        Pa s.

    Examples
    --------
    >>> round(water_viscosity(293.15) * 1e3, 4)
    1.0016
    """
    t = float(temperature) - 273.15
    if not (0.0 <= t <= 100.0):
        raise FieldplanError(
            f"water viscosity: temperature {temperature} K is outside 273.15-373.15 K "
            "(liquid water at atmospheric pressure)."
        )
    return iapws_viscosity(temperature, water_density(temperature))


def air_viscosity(temperature):
    """Dynamic viscosity of air by Sutherland's law (mu_ref 1.716e-5 Pa s at 273.15 K, S = 110.4 K).

    Parameters
    ----------
    temperature : float
        Kelvin.

    Returns
    -------
    float
        Pa s.
    """
    t = float(temperature)
    if t <= 0:
        raise FieldplanError(f"air viscosity: temperature must be > 0 K, got {t}.")
    return 1.716e-5 * (t / 273.15) ** 1.5 * (273.15 + 110.4) / (t + 110.4)


@dataclass(frozen=True)
class Medium:
    """The medium around the bodies.

    Parameters
    ----------
    name : str
        Label, e.g. ``"water"``.
    viscosity : float
        Dynamic viscosity, Pa s.
    temperature : float
        Kelvin.
    density : float
        kg/m^3.
    relative_permittivity : float
        Dimensionless (78 for water at 25 degC).
    conductivity : float
        S/m.
    submerged : bool
        True for a liquid. Vibrating-plate drift reverses sign between a plate in air and a plate
        under liquid, so actuators read this flag.
    """

    name: str = "water"
    viscosity: float = 1.0016e-3
    temperature: float = 293.15
    density: float = 998.2
    relative_permittivity: float = 80.2
    conductivity: float = 1e-3
    submerged: bool = True

    def __post_init__(self):
        for key in ("viscosity", "temperature", "density", "relative_permittivity"):
            v = getattr(self, key)
            if not (isinstance(v, (int, float, np.floating)) and np.isfinite(v) and v > 0):
                raise FieldplanError(f"Medium {key} must be a positive finite number, got {v!r}.")
        if not (np.isfinite(self.conductivity) and self.conductivity >= 0):
            raise FieldplanError(f"Medium conductivity must be >= 0 S/m, got {self.conductivity!r}.")

    @property
    def permittivity(self):
        """Absolute permittivity, F/m."""
        from scipy.constants import epsilon_0

        return self.relative_permittivity * epsilon_0


def water(temperature=293.15, conductivity=1e-3):
    """Water at ``temperature`` (K) with the given conductivity (S/m).

    Viscosity from :func:`water_viscosity` (IAPWS 2008); density from :func:`water_density` (Kell
    1975), and relative permittivity from Malmberg and Maryott (J. Res. NBS 56, 1956):
    ``87.740 - 0.40008 t + 9.398e-4 t^2 - 1.410e-6 t^3`` with ``t`` in degC.

    Examples
    --------
    >>> w = water(298.15)
    >>> round(w.viscosity * 1e3, 3)
    0.89
    """
    t = float(temperature) - 273.15
    eta = water_viscosity(temperature)
    rho = water_density(temperature)
    eps_r = 87.740 - 0.40008 * t + 9.398e-4 * t**2 - 1.410e-6 * t**3
    return Medium("water", eta, float(temperature), rho, eps_r, float(conductivity), True)


def air(temperature=293.15, pressure=101325.0):
    """Dry air at ``temperature`` (K) and ``pressure`` (Pa), ideal gas (R_specific 287.05 J/(kg K))."""
    rho = float(pressure) / (287.05 * float(temperature))
    return Medium("air", air_viscosity(temperature), float(temperature), rho, 1.0006, 0.0, False)
