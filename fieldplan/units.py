"""Units: numbers and unit strings to SI floats (the one place pint is used), and SI values to text.

Scenario files and user code may give a physical value as a plain number (taken as SI) or as a
string with a unit ("150 um", "2 A", "12 kHz", "20 degC"). Everything inside fieldplan is SI.
For people, :func:`format_quantity` writes one SI value with a prefix chosen per quantity and
:func:`si_scale` picks the display factor of a plot axis.
"""

from __future__ import annotations

import functools
import math
import numbers

import numpy as np

from .errors import UnitError

__all__ = ["to_si", "ureg", "format_quantity", "si_scale"]


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


# -- display -------------------------------------------------------------------------------------
# SI prefixes a displayed value may take, smallest first.
_PREFIXES = ((1e-12, "p"), (1e-9, "n"), (1e-6, "µ"), (1e-3, "m"), (1.0, ""), (1e3, "k"), (1e6, "M"), (1e9, "G"))
# Units shown without a unit symbol.
_DIMENSIONLESS = {"", "1", "-", "dimensionless"}
# Base symbols that take a prefix; the largest prefix each may take ("s" stays "s" above one second:
# "1200 s", not "1.2 ks"; a mass in kg already carries one).
_PREFIXABLE = {"m": 1.0, "s": 1.0, "A": 1e9, "V": 1e9, "Hz": 1e9, "T": 1.0, "N": 1.0, "W": 1e9, "J": 1e9,
               "Pa": 1e9, "S": 1.0, "F": 1.0, "C": 1.0, "H": 1.0, "ohm": 1e9, "Ω": 1e9}


def _split_unit(unit):
    """``"m/s"`` -> ``("m", "/s")``; ``"1/s"`` -> ``("", "/s")``; ``"V^2 s"`` -> ``("V^2 s", "")``."""
    unit = (unit or "").strip()
    if unit in _DIMENSIONLESS:
        return "", ""
    head, slash, rest = unit.partition("/")
    head = head.strip()
    if head in _DIMENSIONLESS:
        head = ""
    return head, (slash + rest.strip()) if slash else ""


def si_scale(magnitude, unit):
    """Display factor and unit label for values of about ``magnitude`` in the SI unit ``unit``.

    The prefix goes on the numerator's symbol and is chosen so that ``magnitude * factor`` lies in
    [1, 1000) where the unit allows (``4.2e-6, "m"`` -> ``(1e6, "µm")``; ``2.3e-3, "m/s"`` ->
    ``(1e3, "mm/s")``). Compound or powered numerators (``"A^2 s"``, ``"m^2"``, ``"kg"``) and
    dimensionless units get no prefix (factor 1); ``"1/s"`` is labelled ``"/s"`` and a
    dimensionless unit ``""``. Seconds take no prefix above one second. Use it for plot axes, and
    :func:`format_quantity` for single values in messages.

    Parameters
    ----------
    magnitude : float
        A typical absolute value (e.g. the largest), in ``unit``.
    unit : str
        SI unit symbol as written in fieldplan (``"m"``, ``"m/s"``, ``"V"``, ``"Hz"``, ``"1"``).

    Returns
    -------
    factor : float
        Multiply values by it for display.
    label : str
        Unit label with its prefix.

    Examples
    --------
    >>> si_scale(4.2e-6, "m")
    (1000000.0, 'µm')
    >>> si_scale(0.5, "1/s")
    (1.0, '/s')
    >>> si_scale(3553.0, "V^2 s")
    (1.0, 'V^2 s')
    """
    head, tail = _split_unit(unit)
    top = _PREFIXABLE.get(head)
    if top is None or not magnitude or not math.isfinite(magnitude):
        return 1.0, head + tail
    chosen = _PREFIXES[0][0]
    for f, _ in _PREFIXES:
        if f <= top and abs(magnitude) >= f * (1 - 1e-9):
            chosen = f
    return 1.0 / chosen, dict(_PREFIXES)[chosen] + head + tail


def _plain(v, digits):
    """``v`` to ``digits`` significant digits, without an exponent between 1e-4 and 1e6."""
    if v == 0 or not math.isfinite(v):
        return f"{v:g}"
    a = abs(v)
    if 1e-4 <= a < 1e6:
        exp = math.floor(math.log10(a))
        dec = max(digits - 1 - exp, 0)
        text = f"{round(v, dec):.{dec}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
        return "0" if text in ("-0", "") else text
    return f"{v:.{digits}g}"


def format_quantity(value, unit="", digits=3):
    """A value with its unit for people: ``format_quantity(4.2e-6, "m")`` -> ``"4.2 µm"``.

    The one formatter of physical values in fieldplan's messages, tables and labels. The SI prefix
    is chosen per quantity (see :func:`si_scale`), so a message that mixes lengths and speeds shows
    each in its own readable prefix ("stalled 53.8 mm from its goal", "at 2.35 mm/s"). Dimensionless
    values get no unit symbol ("5", never "5 1"), and ``"1/s"`` reads ``"/s"``.

    Parameters
    ----------
    value : float or None
        In the SI unit ``unit``; ``None`` and nan give ``"n/a"``.
    unit : str
        SI unit symbol (``"m"``, ``"m/s"``, ``"A"``, ``"V/s"``, ``"Hz"``, ``"s"``, ``"1"``, ``""``).
    digits : int
        Significant digits.

    Returns
    -------
    str

    Examples
    --------
    >>> format_quantity(4.2e-6, "m")
    '4.2 µm'
    >>> format_quantity(0.0538, "m"), format_quantity(2.349e-3, "m/s")
    ('53.8 mm', '2.35 mm/s')
    >>> format_quantity(5, "1"), format_quantity(20, "1/s"), format_quantity(13.35, "V", digits=4)
    ('5', '20 /s', '13.35 V')
    >>> format_quantity(0.0, "m"), format_quantity(float("nan"), "m"), format_quantity(1200.0, "s")
    ('0 m', 'n/a', '1200 s')
    """
    if value is None:
        return "n/a"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if math.isnan(v):
        return "n/a"
    if math.isinf(v) or v == 0:
        label = si_scale(1.0, unit)[1]
        return f"{v:g} {label}".strip()
    f, label = si_scale(abs(v), unit)
    x = v * f
    if f != 1.0 and abs(float(_plain(x, digits))) >= 1000:
        # Rounding carried the mantissa to 1000: take the next prefix up (999.96 µm -> 1 mm).
        f, label = si_scale(abs(v) * 1.001, unit)
        x = v * f
    return f"{_plain(x, digits)} {label}".strip()
