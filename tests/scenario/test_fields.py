"""Schema keys from dataclass field metadata (fieldplan.scenario.fields)."""

import dataclasses
import pathlib
import re
from dataclasses import dataclass, field

import pytest

from fieldplan.planning.settings import PlanSettings
from fieldplan.scenario import model
from fieldplan.scenario.fields import (CHANNEL_UNIT, SETTINGS_TABLE_BEGIN, SETTINGS_TABLE_END, Key, channel_unit,
                                       field_keys, key_row_markdown, readme_parts, refresh_readme,
                                       settings_table_markdown, update_readme)
from fieldplan.scenario.schema import SCHEMA


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


# -- the README's generated parts ----------------------------------------------------------------

README = pathlib.Path(__file__).resolve().parents[2] / "README.md"
REGENERATE = ("regenerate it from the dataclasses: "
              "python -c \"import fieldplan.scenario.fields as f; f.update_readme('README.md')\"")


def _table_rows(markdown):
    return {m[1]: m.groups()[1:] for m in re.finditer(r"^\| `(\w+)` \| (.*?) \| (.*?) \| (.*) \|$", markdown, re.M)}


def test_the_settings_table_renders_each_field_from_its_metadata():
    rows = _table_rows(settings_table_markdown(Pump, skip=("other",)))
    assert list(rows) == ["name", "rate", "mode", "strokes", "primed", "gain", "label", "offset", "ports"]
    assert rows["name"] == ("**required**", "", "Label.")
    assert rows["rate"] == ("", "m^3/s", "Flow rate.")                 # None and no default_text: empty
    assert rows["mode"] == ("`push`", "", "Direction. Values: `push`, `pull`.")
    assert rows["strokes"][0] == "`3`" and rows["primed"][0] == "`false`" and rows["gain"][0] == "`1`"


def test_a_computed_default_is_shown_in_words_and_pipes_do_not_end_a_cell():
    @dataclass
    class Grid:
        cell: float | None = field(default=None, metadata={
            "unit": "m", "default_text": "1/64 of the side", "doc": "Cell, of length |a| / |b|."})

    (line,) = [ln for ln in settings_table_markdown(Grid).splitlines() if ln.startswith("| `cell`")]
    assert line == "| `cell` | 1/64 of the side | m | Cell, of length \\|a\\| / \\|b\\|. |"
    assert field_keys(Grid)[0].default_text == "1/64 of the side"


def test_the_key_row_lists_the_format_keys_then_the_fields():
    keys = field_keys(Pump, skip=("other", "ports", "offset"))
    row = key_row_markdown("pump", [Key("count", "int")] + keys, fields_note="any Pump field")
    assert row == ("| `pump` | `count` and any Pump field: `name`, `rate` (m^3/s), `mode` (push \\| pull), "
                   "`strokes`, `primed`, `gain`, `label` |")


def test_refresh_readme_needs_its_markers_and_rows():
    good = f"x\n{SETTINGS_TABLE_BEGIN}\nold\n{SETTINGS_TABLE_END}\n| `planner` | old |\n"
    assert refresh_readme(good, "new\n", {"planner": "| `planner` | new |"}) == (
        f"x\n{SETTINGS_TABLE_BEGIN}\nnew\n{SETTINGS_TABLE_END}\n| `planner` | new |\n")
    with pytest.raises(ValueError, match="settings-table:end"):
        refresh_readme(good.replace(SETTINGS_TABLE_END, ""), "new\n", {})
    with pytest.raises(ValueError, match="one row for `planner`, found 2"):
        refresh_readme(good + "| `planner` | again |\n", "new\n", {"planner": "| `planner` | new |"})


def test_the_readme_settings_table_and_planner_row_are_the_generated_ones():
    text = README.read_text(encoding="utf-8")
    table, rows = readme_parts()
    region = text.split(SETTINGS_TABLE_BEGIN + "\n", 1)[1].split(SETTINGS_TABLE_END, 1)[0]
    assert region == table, f"README.md's planner settings table differs from PlanSettings' metadata; {REGENERATE}"
    for section, row in rows.items():
        assert row in text.splitlines(), f"README.md's `{section}` key-table row differs from the schema; {REGENERATE}"
    assert refresh_readme(text, table, rows) == text


def test_the_generated_table_has_a_row_per_setting_with_its_unit_and_default():
    rows = _table_rows(readme_parts()[0])
    fields = dataclasses.fields(PlanSettings)
    assert list(rows) == [f.name for f in fields]
    for f in fields:
        default, unit, meaning = rows[f.name]
        assert unit == (f.metadata.get("unit") or "") and meaning.startswith(f.metadata["doc"].replace("|", "\\|"))
        assert default, f"{f.name} has no default in the README table"


def test_update_readme_rewrites_a_stale_copy_and_leaves_a_current_one(tmp_path):
    current = README.read_text(encoding="utf-8")
    stale = current.replace("| `tolerance` |", "| `tolerance` | edited by hand |", 1)
    stale = re.sub(r"^\| `planner` \|.*$", "| `planner` | edited |", stale, count=1, flags=re.M)
    assert stale != current
    path = tmp_path / "README.md"
    path.write_text(stale, encoding="utf-8")
    assert update_readme(path) is True and path.read_text(encoding="utf-8") == current
    assert update_readme(path) is False


@pytest.mark.parametrize("section,cls", [("simulation", "SimulationSettings"), ("outputs", "OutputSettings")])
def test_simulation_and_output_keys_are_their_dataclass_fields(section, cls):
    fields = dataclasses.fields(getattr(model, cls))
    keys = SCHEMA[section]
    assert [k.name for k in keys] == [f.name for f in fields]
    for k, f in zip(keys, fields):
        assert k.doc == f.metadata["doc"] and k.unit == f.metadata.get("unit")
        if f.metadata.get("default_text") is None:
            assert k.default == f.default          # the schema shows the dataclass default itself
