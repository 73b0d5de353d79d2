"""Schema keys from dataclass field metadata (fieldplan.scenario.fields)."""

from dataclasses import dataclass, field

import pytest

from fieldplan.scenario.fields import CHANNEL_UNIT, channel_unit, field_keys


@dataclass
class Pump:
    name: str = field(metadata={"doc": "Label."})
    rate: float | None = field(default=None, metadata={"unit": "m^3/s", "doc": "Flow rate."})
    mode: str = field(default="push", metadata={"choices": ("push", "pull"), "doc": "Direction."})
    strokes: int = 3
    primed: bool = False
    gain: float = 1.0
    label: str | None = None
    offset: tuple | None = field(default=None, metadata={"unit": "m", "kind": "vector3"})
    ports: dict = field(default_factory=dict, metadata={"kind": "map"})
    other: object = None


def test_kinds_units_defaults_and_required_come_from_the_fields():
    keys = {k.name: k for k in field_keys(Pump)}
    assert list(keys) == ["name", "rate", "mode", "strokes", "primed", "gain", "label", "offset", "ports", "other"]
    assert {n: k.kind for n, k in keys.items()} == {
        "name": "str", "rate": "quantity", "mode": "choice", "strokes": "int", "primed": "bool", "gain": "number",
        "label": "str", "offset": "vector3", "ports": "map", "other": "any"}
    assert keys["name"].required and not keys["rate"].required
    assert keys["rate"].unit == "m^3/s" and keys["rate"].doc == "Flow rate." and keys["rate"].default is None
    assert keys["mode"].choices == ("push", "pull") and keys["mode"].default == "push"
    assert keys["ports"].default == {}                  # from the default factory
    assert all(k.field == n for n, k in keys.items())


def test_rename_and_skip():
    keys = field_keys(Pump, rename={"name": "kind"}, skip=("other", "ports"))
    assert [k.name for k in keys][:2] == ["kind", "rate"] and keys[0].field == "name"
    assert "other" not in {k.name for k in keys} and "ports" not in {k.name for k in keys}


@pytest.mark.parametrize("unit,channel,expected", [
    ("<unit>", "A", "A"), ("<unit>/s", "A", "(A)/s"), ("<unit>/s", "1", "(1)/s"), ("s", "A", "s"), (None, "A", None)])
def test_channel_unit(unit, channel, expected):
    assert CHANNEL_UNIT == "<unit>"
    assert channel_unit(unit, channel) == expected
