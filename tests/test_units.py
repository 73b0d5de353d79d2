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


# -- issue 16, item 10: one quantity formatter with SI prefixes chosen per quantity ---------------
from fieldplan.units import format_quantity, si_scale  # noqa: E402


@pytest.mark.parametrize("value, unit, digits, expected", [
    (4.2e-6, "m", 3, "4.2 µm"),
    (0.0538, "m", 3, "53.8 mm"),          # was "0.0538 m" beside "2349 um/s" in one message
    (2.349e-3, "m/s", 3, "2.35 mm/s"),
    (5, "1", 3, "5"),                     # never "5 1"
    (5, "", 3, "5"),
    (20, "1/s", 3, "20 /s"),              # never "(1)/s"
    (13.35, "V", 4, "13.35 V"),
    (12e3, "Hz", 3, "12 kHz"),
    (0.02, "s", 3, "20 ms"),
    (1200.0, "s", 3, "1200 s"),           # seconds take no k prefix
    (999.96e-6, "m", 3, "1 mm"),          # rounding carries into the next prefix
    (-2.5e-3, "m", 3, "-2.5 mm"),
    (3553.2, "V^2 s", 3, "3553 V^2 s"),   # a powered unit takes no prefix (kV^2 s would mean 1e6)
    (0.0, "m", 3, "0 m"),
    (float("nan"), "m", 3, "n/a"),
    (None, "m", 3, "n/a"),
    (float("inf"), "m", 3, "inf m"),
])
def test_format_quantity(value, unit, digits, expected):
    assert format_quantity(value, unit, digits=digits) == expected


def test_si_scale_for_axes():
    assert si_scale(4.2e-6, "m") == (1e6, "µm")
    assert si_scale(2e-4, "m/s") == (1e6, "µm/s")
    assert si_scale(0.5, "1") == (1.0, "")
    assert si_scale(0.5, "1/s") == (1.0, "/s")
    assert si_scale(900.0, "kg/m^3") == (1.0, "kg/m^3")
    f, label = si_scale(3e-9, "m")
    assert label == "nm" and f == pytest.approx(1e9)
