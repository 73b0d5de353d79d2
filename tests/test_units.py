import pytest

from fieldplan import UnitError, to_si


@pytest.mark.parametrize("text, unit, expected", [
    ("150 um", "m", 150e-6),
    ("150 µm", "m", 150e-6),
    ("2 A", "A", 2.0),
    ("12 kHz", "Hz", 12e3),
    ("20 degC", "K", 293.15),
    ("1 mS/cm", "S/m", 0.1),
    ("0.89 mPa*s", "Pa*s", 0.89e-3),
    (3, "m", 3.0),
])
def test_parses_numbers_and_unit_strings(text, unit, expected):
    assert to_si(text, unit) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("bad, unit, fragment", [
    ("2 A", "m", "expected a quantity in m"),
    ("3 furlongz", "m", "cannot read"),
    ("abc", "m", "cannot read"),
    ("5", "m", "has no unit"),
    ([1, 2], "m", "expected a number"),
    (True, "m", "expected a number"),
    (float("nan"), "m", "finite"),
])
def test_bad_quantities_name_the_expected_unit(bad, unit, fragment):
    with pytest.raises(UnitError, match=fragment):
        to_si(bad, unit, name="radius")
    with pytest.raises(ValueError, match="radius"):
        to_si(bad, unit, name="radius")
