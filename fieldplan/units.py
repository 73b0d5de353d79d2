"""Parsing of numbers and unit strings to SI floats (the one place pint is used).

Scenario files and user code may give a physical value as a plain number (taken as SI) or as a
string with a unit ("150 um", "2 A", "12 kHz", "20 degC"). Everything inside fieldplan is SI.
"""

from __future__ import annotations

import functools
import numbers

import numpy as np

from .errors import UnitError

__all__ = ["to_si", "ureg"]


@functools.lru_cache(maxsize=1)
def ureg():
    """The shared pint ``UnitRegistry`` (created on first use, since pint is slow to load)."""
    import pint

    reg = pint.UnitRegistry(autoconvert_offset_to_baseunit=True)
    # "um" is pint's micrometre already; "µm" and "μm" (two different code points) too.
    return reg


def to_si(value, unit, name="value"):
    """Convert a number or a unit string to a float in the SI unit ``unit``.

    Parameters
    ----------
    value : float, int or str
        A plain number (already SI) or a string such as ``"150 um"`` or ``"20 degC"``.
    unit : str
        The SI unit expected, in pint syntax (``"m"``, ``"A"``, ``"Hz"``, ``"K"``, ``"Pa*s"``,
        ``"dimensionless"``).
    name : str
        What the value is, used in error messages.

    Returns
    -------
    float
        The value in ``unit``.

    Raises
    ------
    UnitError
        If the string cannot be parsed, the unit is unknown, or the dimension is wrong.

    Examples
    --------
    >>> to_si("150 um", "m")
    0.00015
    >>> round(to_si("20 degC", "K"), 2)
    293.15
    >>> to_si(2.0, "A")
    2.0
    """
    if isinstance(value, bool):
        raise UnitError(f"{name}: expected a number or a string with a unit of {unit}, got {value!r}.")
    if isinstance(value, numbers.Real):
        out = float(value)
        if not np.isfinite(out):
            raise UnitError(f"{name}: expected a finite number, got {value!r}.")
        return out
    if not isinstance(value, str):
        raise UnitError(
            f"{name}: expected a number (SI, {unit}) or a string such as '1.5 {unit}', "
            f"got {type(value).__name__} {value!r}."
        )
    import pint

    reg = ureg()
    text = value.strip().replace("µ", "u").replace("μ", "u")
    try:
        q = reg.Quantity(text)
    except (pint.errors.UndefinedUnitError, pint.errors.DefinitionSyntaxError, AttributeError,
            ValueError, TypeError, SyntaxError) as exc:
        raise UnitError(f"{name}: cannot read {value!r} as a quantity in {unit} ({exc}).") from None
    try:
        target = reg.Unit(unit)
    except Exception as exc:  # pragma: no cover - programming error, not user input
        raise UnitError(f"unknown target unit {unit!r}") from exc
    if not isinstance(q, reg.Quantity):
        q = reg.Quantity(float(q), "dimensionless")
    if q.dimensionality != target.dimensionality:
        if q.dimensionless and target.dimensionless is False:
            raise UnitError(
                f"{name}: {value!r} has no unit; write it with a unit of {unit} "
                f"(e.g. '{q.magnitude} {unit}') or as a plain SI number."
            )
        raise UnitError(
            f"{name}: {value!r} has dimension {q.dimensionality}, expected a quantity in {unit} "
            f"({target.dimensionality})."
        )
    out = float(q.to(target).magnitude)
    if not np.isfinite(out):
        raise UnitError(f"{name}: expected a finite value, got {value!r}.")
    return out
