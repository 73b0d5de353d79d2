"""The fluid or gas around the bodies: viscosity, temperature, density, permittivity, conductivity."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import FieldplanError

__all__ = ["Medium", "water", "air", "water_viscosity", "air_viscosity"]


def water_viscosity(temperature):
    """Dynamic viscosity of liquid water at 0.1 MPa.

    Uses the correlation of Kestin, Sokolov and Wakeham (J. Phys. Chem. Ref. Data 7, 941, 1978),
    ``log10(eta/eta20) = (20 - t)/(t + 96) * (1.2364 - 1.37e-3 (20 - t) + 5.7e-6 (20 - t)^2)``
    with ``eta20 = 1.0016 mPa s``; it agrees with IAPWS R12-08 to better than 0.1 % between
    0 and 100 degC (checked in the tests at 20 and 25 degC).

    Parameters
    ----------
    temperature : float
        Kelvin, 273.15 to 373.15.

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
    d = 20.0 - t
    return 1.0016e-3 * 10.0 ** (d / (t + 96.0) * (1.2364 - 1.37e-3 * d + 5.7e-6 * d * d))


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

    Viscosity from :func:`water_viscosity`; density from the Kell (1975) fit for air-free water,
    and relative permittivity from Malmberg and Maryott (J. Res. NBS 56, 1956):
    ``87.740 - 0.40008 t + 9.398e-4 t^2 - 1.410e-6 t^3`` with ``t`` in degC.

    Examples
    --------
    >>> w = water(298.15)
    >>> round(w.viscosity * 1e3, 3)
    0.89
    """
    t = float(temperature) - 273.15
    eta = water_viscosity(temperature)
    # Kell, J. Chem. Eng. Data 20 (1975) 97, valid 0-150 degC.
    rho = (999.83952 + 16.945176 * t - 7.9870401e-3 * t**2 - 46.170461e-6 * t**3
           + 105.56302e-9 * t**4 - 280.54253e-12 * t**5) / (1.0 + 16.879850e-3 * t)
    eps_r = 87.740 - 0.40008 * t + 9.398e-4 * t**2 - 1.410e-6 * t**3
    return Medium("water", eta, float(temperature), rho, eps_r, float(conductivity), True)


def air(temperature=293.15, pressure=101325.0):
    """Dry air at ``temperature`` (K) and ``pressure`` (Pa), ideal gas (R_specific 287.05 J/(kg K))."""
    rho = float(pressure) / (287.05 * float(temperature))
    return Medium("air", air_viscosity(temperature), float(temperature), rho, 1.0006, 0.0, False)
