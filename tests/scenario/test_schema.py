"""The scenario schema follows the dataclasses it fills: every field is a key with its unit, no key is stale,
values are checked by the dataclass and reported at file, line and key."""

import dataclasses
import pathlib
import re

import pytest

from fieldplan import ScenarioError
from fieldplan.contract.schedule import ChannelLimit, HardwareLimits
from fieldplan.planning.settings import PlanSettings
from fieldplan.scenario import SCHEMA, dump_scenario, load_scenario, schema_reference
from fieldplan.scenario.params import param_info
from fieldplan.scenario.sections import LOOSER_THAN_DECLARED
from fieldplan.units import ureg
from fieldplan.world.body import Body, Shell

from test_scenario import BASE, line_of  # the scenario tests' base file (tests/scenario is on the path)

README = pathlib.Path(__file__).resolve().parents[2] / "README.md"

# (section, dataclass, field -> key name, fields a file does not set under their own name)
SECTIONS = [
    ("planner", PlanSettings, {}, {"assign_goals"}),       # set by goals.unlabelled
    ("bodies[]", Body, {"name": "kind"}, {"extra"}),
    ("bodies[].shell", Shell, {}, set()),
    ("limits", HardwareLimits, {}, set()),
    ("limits.channels.<name>", ChannelLimit, {}, set()),
]
# Keys of the file format that set no field of the section's dataclass.
FORMAT_KEYS = {"planner": {"mode"}, "bodies[]": {"count"}, "bodies[].shell": set(), "limits": {"all_channels"},
               "limits.channels.<name>": set()}


@pytest.mark.parametrize("section,cls,rename,skipped", SECTIONS, ids=[s[0] for s in SECTIONS])
def test_every_field_is_a_key_with_its_unit(section, cls, rename, skipped):
    keys = {k.name: k for k in SCHEMA[section]}
    for f in dataclasses.fields(cls):
        if f.name in skipped:
            assert rename.get(f.name, f.name) not in keys, f.name
            continue
        k = keys[rename.get(f.name, f.name)]
        assert k.field == f.name and k.unit == f.metadata.get("unit"), f.name
        assert k.doc and k.doc == f.metadata["doc"], f"{cls.__name__}.{f.name} has no doc line in its metadata"
        assert k.required == (f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING)


@pytest.mark.parametrize("section,cls,rename,skipped", SECTIONS, ids=[s[0] for s in SECTIONS])
def test_no_key_is_anything_but_a_field_or_a_key_of_the_format(section, cls, rename, skipped):
    names = {rename.get(f.name, f.name) for f in dataclasses.fields(cls)} - skipped
    assert {k.name for k in SCHEMA[section]} == names | FORMAT_KEYS[section]


def test_the_stale_planner_keys_are_gone():
    # These were once listed with units although PlanSettings has no such fields.
    stale = {"max_step", "trust_region", "goal_hold", "step_time_limit", "separation", "duration", "max_time"}
    assert not stale & {k.name for k in SCHEMA["planner"]}
    import fieldplan.scenario as scenario
    import fieldplan.scenario.schema as schema

    for name in ("PLANNER_UNITS", "PLANNER_CHOICES", "PLANNER_OPTIONAL_INTS", "_PLANNER_FALLBACK", "planner_fields"):
        assert not hasattr(schema, name) and not hasattr(scenario, name), name


def _same_unit(a, b):
    return ureg().Unit(a.replace("^", "**")).dimensionality == ureg().Unit(b.replace("^", "**")).dimensionality


@pytest.mark.parametrize("cls", [PlanSettings, Body, Shell, HardwareLimits, ChannelLimit], ids=lambda c: c.__name__)
def test_metadata_units_are_units_and_agree_with_the_docstring(cls):
    stated = {n: u for n, (_, u, _) in param_info(cls).items() if u}     # "Control period, s."
    for f in dataclasses.fields(cls):
        unit = f.metadata.get("unit")
        if unit is None:
            assert f.name not in stated, f"{cls.__name__}.{f.name}: the docstring says {stated[f.name]}, no unit in metadata"
            continue
        si = unit.replace("<unit>", "A")            # the channel's unit: any will do to parse
        ureg().Unit(si.replace("^", "**"))
        if f.name in stated:
            assert _same_unit(si, stated[f.name]), (f.name, unit, stated[f.name])


def test_docstring_units_are_read_so_the_check_above_can_fail():
    stated = {n: u for n, (_, u, _) in param_info(PlanSettings).items() if u}
    assert stated["period"] == "s" and stated["tolerance"] == "m"
    assert not _same_unit("s", "m")


# -- reading: errors at file, line and key -------------------------------------------------------

def problems(text, name="t.yaml"):
    with pytest.raises(ScenarioError) as err:
        load_scenario(text, name=name)
    return err.value.problems


PLANNER_QUANTITIES = [k for k in SCHEMA["planner"] if k.unit]


def test_the_planner_has_unit_bearing_keys():
    assert {k.name for k in PLANNER_QUANTITIES} >= {"period", "tolerance", "time_limit", "clearance",
                                                    "route_resolution", "table_resolution", "max_trust"}


@pytest.mark.parametrize("key", PLANNER_QUANTITIES, ids=lambda k: k.name)
def test_a_planner_setting_in_a_wrong_unit_is_an_error_at_its_line(key):
    wrong = "3 kg"
    text = BASE.replace("planner: {tolerance: 10 um}", f"planner:\n  iterations: 2\n  {key.name}: {wrong}")
    ps = problems(text, name="units.yaml")
    assert len(ps) == 1, ps
    file, line, where, msg = ps[0]
    assert (file, line, where) == ("units.yaml", line_of(text, f"{key.name}: {wrong}"), f"planner.{key.name}")
    assert key.unit in msg and wrong in msg


def test_a_planner_setting_in_its_unit_is_converted():
    sc = load_scenario(BASE.replace("planner: {tolerance: 10 um}", "planner: {period: 250 ms, max_trust: 20 um}"),
                       name="t.yaml")
    assert sc.planner == {"period": pytest.approx(0.25), "max_trust": pytest.approx(2e-5)}
    assert sc.plan_settings().period == pytest.approx(0.25)


@pytest.mark.parametrize("setting,needle", [
    ("iterations: 0", "iterations"), ("trust_fraction: -1", "trust_fraction"), ("tolerance: -10 um", "tolerance"),
    ("arrival_margin: 2", "arrival_margin"), ("horizon: 2.5", "horizon")])
def test_planner_values_are_checked_by_plan_settings_at_their_line(setting, needle):
    text = BASE.replace("planner: {tolerance: 10 um}", f"planner:\n  method: horizon\n  {setting}")
    ps = problems(text)
    assert [(p[0], p[1], p[2]) for p in ps] == [("t.yaml", line_of(text, setting), f"planner.{needle}")]


def test_null_is_the_default_only_where_the_default_is_computed():
    sc = load_scenario(BASE.replace("planner: {tolerance: 10 um}", "planner: {tolerance: null}"), name="t.yaml")
    assert sc.planner == {"tolerance": None}
    text = BASE.replace("planner: {tolerance: 10 um}", "planner:\n  field_table: null")
    ps = problems(text)
    assert ps[0][2] == "planner.field_table" and ps[0][1] == line_of(text, "field_table") and "True" in ps[0][3]


@pytest.mark.parametrize("old,new,key,written", [
    ("radius: 5 um", "radius: -5 um", "bodies[0].radius", "'-5 um'"),
    ("radius: 5 um", "radius: 5 um, height: 4 um", "bodies[0].height", "'4 um'"),
    ("radius: 5 um", "radius: 5 um, shell: {thickness: -5 nm, membrane_permittivity: 10, membrane_conductivity: 0, "
                     "interior_permittivity: 60, interior_conductivity: 0.5}", "bodies[0].shell.thickness", "'-5 nm'"),
    ("slew_rate: 100", "slew_rate: -100", "limits.channels.source_1.slew_rate", None),
    ("slew_rate: 100", "lower: 0.6", "limits.channels.source_1.lower", None),
    ("time_step: 1 ms", "time_step: 0 s", "limits.time_step", "'0 s'"),
])
def test_body_and_limit_values_are_checked_by_their_dataclass_at_their_line(old, new, key, written):
    text = BASE.replace(old, new)
    ps = problems(text)
    assert [(p[0], p[2]) for p in ps] == [("t.yaml", key)], ps
    assert ps[0][1] == line_of(text, new)
    if written:
        assert f"(the file gives {written})" in ps[0][3]


def test_a_problem_of_each_dataclass_is_reported_at_once():
    text = (BASE.replace("radius: 5 um", "radius: -5 um").replace("slew_rate: 100", "slew_rate: -1")
                .replace("planner: {tolerance: 10 um}", "planner: {tolerance: -10 um}"))
    assert [p[2] for p in problems(text)] == ["bodies[0].radius", "limits.channels.source_1.slew_rate",
                                              "planner.tolerance"]


def test_a_body_kind_named_like_a_field_does_not_misplace_the_error():
    text = BASE.replace("kind: bead", "kind: radius").replace("radius: 5 um", "radius: 5 um, height: 4 um")
    assert problems(text)[0][2] == "bodies[0].height"


def test_gap_is_read_and_a_resolution_limit_round_trips():
    text = BASE.replace("radius: 5 um", "radius: 5 um, gap: 20 nm").replace("slew_rate: 100",
                                                                               "slew_rate: 100, resolution: 1e-3")
    sc = load_scenario(text, name="t.yaml")
    assert sc.bodies[0].height == pytest.approx(5.02e-6, rel=1e-12)
    assert sc.limits.get("source_1").resolution == pytest.approx(1e-3)
    back = load_scenario(dump_scenario(sc), name="again.yaml")
    assert back.bodies == sc.bodies and back.limits.to_dict() == sc.limits.to_dict()


def test_every_channel_limit_has_a_tightening_rule():
    assert set(LOOSER_THAN_DECLARED) == {f.name for f in dataclasses.fields(ChannelLimit)}
    looser, phrase = LOOSER_THAN_DECLARED["resolution"]
    assert not looser(2e-3, 1e-3) and not looser(1e-3, 1e-3)
    assert looser(1.5e-3, 1e-3) and looser(5e-4, 1e-3) and "multiple" in phrase
    assert LOOSER_THAN_DECLARED["upper"][0](2.0, 1.0) and not LOOSER_THAN_DECLARED["upper"][0](0.5, 1.0)


# -- the reference ---------------------------------------------------------------------------------

def _rows(markdown, section):
    """``{key: (type, unit)}`` of one section's table in the schema reference."""
    block = markdown.split(f"### `{section}`\n", 1)[1].split("\n### ", 1)[0]
    out = {}
    for line in block.splitlines():
        m = re.match(r"^\| `([^`]+)` \| (.*?) \| (.*?) \|", line)
        if m:
            out[m[1]] = (m[2], m[3])
    return out


@pytest.mark.parametrize("section,cls,rename,skipped", SECTIONS, ids=[s[0] for s in SECTIONS])
def test_the_reference_lists_every_field_with_its_unit(section, cls, rename, skipped):
    rows = _rows(schema_reference(), section)
    for f in dataclasses.fields(cls):
        if f.name not in skipped:
            assert rows[rename.get(f.name, f.name)][1] == (f.metadata.get("unit") or ""), f.name


def test_the_reference_escapes_pipes_in_meanings():
    rows = [ln for ln in schema_reference().splitlines() if ln.startswith("| `trust_fraction` |")]
    assert len(rows) == 1 and "\\|f\\|" in rows[0] and rows[0].replace("\\|", "").count("|") == 6


def _readme_row(section):
    text = README.read_text(encoding="utf-8")
    line = next(ln for ln in text.splitlines() if ln.startswith(f"| `{section}` |"))
    # `name` or `name` (unit, ...) or `name`\* (unit); class names (`PlanSettings`) are not keys
    return {m[1]: (m[2] or "") for m in re.finditer(r"`([a-z][\w.<>]*)`\\?\*?(?: \(([^)]*)\))?", line.split("|", 2)[2])}


README_UNITS = {"channel unit": "<unit>", "unit": "<unit>", "unit/s": "<unit>/s"}


@pytest.mark.parametrize("row,sections,exhaustive", [
    ("bodies[]", ["bodies[]", "bodies[].shell"], True),
    ("limits", ["limits", "limits.channels.<name>"], True),
    ("planner", ["planner"], False),        # the planner row names the common settings, then "weights ..."
])
def test_the_readme_key_table_agrees_with_the_schema(row, sections, exhaustive):
    keys = {k.name: k for s in sections for k in SCHEMA[s]}
    named = {n.replace("channels.<name>", "channels"): u for n, u in _readme_row(row).items()}
    assert set(named) <= set(keys), set(named) - set(keys)
    if exhaustive:
        assert set(named) == set(keys), set(keys) - set(named)
    for name, unit in named.items():
        piece = README_UNITS.get(unit.split(",")[0].strip(), unit.split(",")[0].strip())
        want = keys[name].unit
        if not piece:
            continue            # `lower`, `upper` (channel unit): the unit is written once for both
        if want and "<unit>" in want:
            assert piece == want, (name, unit)
        elif want:
            assert _same_unit(piece.replace(" ", "*"), want), (name, unit, want)
