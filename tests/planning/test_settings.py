"""PlanSettings: choices are checked from the field metadata, and the docstring and the metadata describe
the same fields (names, units, choices, optional), so neither can drift from the other unnoticed."""

import dataclasses
import re
from dataclasses import dataclass, field

import pytest

from fieldplan.errors import FieldplanError
from fieldplan.planning.settings import PlanSettings

CHOICE_FIELDS = [f for f in dataclasses.fields(PlanSettings) if f.metadata.get("choices")]


def test_the_text_settings_declare_their_choices():
    assert {f.name for f in CHOICE_FIELDS} >= {"method", "balance", "backend"}


@pytest.mark.parametrize("f", CHOICE_FIELDS, ids=lambda f: f.name)
def test_every_choice_is_accepted(f):
    for value in f.metadata["choices"]:
        assert getattr(PlanSettings(**{f.name: value}), f.name) == value


@pytest.mark.parametrize("bad", ["fast", "", 1, None, ["horizon"]], ids=repr)
@pytest.mark.parametrize("f", CHOICE_FIELDS, ids=lambda f: f.name)
def test_a_value_outside_the_choices_names_the_field_and_every_allowed_value(f, bad):
    with pytest.raises(FieldplanError) as err:
        PlanSettings(**{f.name: bad})
    msg = str(err.value)
    assert msg.startswith(f"PlanSettings {f.name} must be ") and msg.endswith(f", got {bad!r}.")
    for value in f.metadata["choices"]:
        assert repr(value) in msg, (value, msg)


def test_the_choice_message_reads_as_before():
    with pytest.raises(FieldplanError, match=r"^PlanSettings balance must be 'time' or 'squared', got 'fast'\.$"):
        PlanSettings(balance="fast")


def test_a_choice_added_to_the_metadata_is_accepted_without_touching_the_checks(monkeypatch):
    f = next(f for f in dataclasses.fields(PlanSettings) if f.name == "backend")
    monkeypatch.setattr(f, "metadata", {**f.metadata, "choices": ("osqp", "cvxpy", "other")})
    assert PlanSettings(backend="other").backend == "other"
    with pytest.raises(FieldplanError, match=r"one of 'osqp', 'cvxpy' or 'other'"):
        PlanSettings(backend="nope")


# -- the docstring against the metadata ----------------------------------------------------------

def documented_parameters(cls):
    """``{name: (type text, description)}`` of the numpydoc Parameters section of ``cls``'s docstring.

    A line ``a, b : float`` documents ``a`` and ``b`` with the same text.
    """
    doc = cls.__doc__ or ""
    m = re.search(r"\n\s*Parameters\n\s*-+\n(.*?)(?:\n\s*\w[\w ]*\n\s*-+\n|\Z)", doc, re.S)
    if not m:
        return {}
    lines = m.group(1).splitlines()
    indent = min(len(ln) - len(ln.lstrip()) for ln in lines if ln.strip())
    out, names, typ, text = {}, [], "", []

    def flush():
        for n in names:
            out[n] = (typ, " ".join(" ".join(text).split()))

    for ln in lines:
        if ln.strip() and len(ln) - len(ln.lstrip()) == indent:
            flush()
            head, _, typ = ln.strip().partition(" : ")
            names, typ, text = [n.strip() for n in head.split(",")], typ.strip(), []
        elif ln.strip():
            text.append(ln.strip())
    flush()
    return out


def _base_type(annotation):
    parts = [p.strip() for p in str(annotation).split("|") if p.strip() not in ("None", "NoneType")]
    return parts[0] if len(parts) == 1 else None


def docstring_problems(cls):
    """What the docstring of dataclass ``cls`` says differently from its fields' metadata, in words."""
    params = documented_parameters(cls)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    problems = [f"{n}: documented, but {cls.__name__} has no such field" for n in params if n not in fields]
    for name, f in fields.items():
        if not f.metadata:
            continue
        if name not in params:
            problems.append(f"{name}: has metadata but is not in the docstring's Parameters")
            continue
        typ, text = params[name]
        unit = f.metadata.get("unit")
        if unit and not re.search(rf",\s+{re.escape(unit)}(?=[\s.,;)]|$)", text):
            problems.append(f"{name}: the metadata unit {unit!r} is not in the docstring text {text[:60]!r}...")
        optional = "optional" in typ
        if optional != (f.default is None):
            problems.append(f"{name}: the docstring type {typ!r} and the default {f.default!r} disagree on optional")
        choices = f.metadata.get("choices")
        listed = re.match(r"\{(.*)\}", typ)
        if choices or listed:
            said = tuple(re.findall(r"[\"']([^\"']*)[\"']", listed.group(1))) if listed else ()
            if set(said) != set(choices or ()):
                problems.append(f"{name}: the docstring lists {said}, the metadata choices are {choices}")
        else:
            base = _base_type(f.type)
            if base and not typ.startswith(base):
                problems.append(f"{name}: the docstring type {typ!r} is not the annotation's {base!r}")
    return problems


def test_the_docstring_and_the_metadata_describe_the_same_fields():
    assert docstring_problems(PlanSettings) == []


def test_the_docstring_parser_reads_every_plan_setting():
    params = documented_parameters(PlanSettings)
    assert params["period"][0] == "float, optional" and params["period"][1].startswith("Control period, s.")
    assert params["method"][0] == '{"horizon", "step"}'
    # a line naming three parameters documents each
    assert params["effort_weight"] == params["tracking_weight"] == params["smoothness_weight"]
    assert params["settle_steps"][1] == "Most extra periods spent on that settling."      # the last entry


@dataclass
class Drifted:
    """A made-up settings class whose docstring has drifted from its fields.

    Parameters
    ----------
    speed : float
        Speed, m/s.
    mode : {"fast", "slow"}
        Mode.
    count : int, optional
        How many.
    label : str
        A label.
    gone : float
        A field that was removed.

    Notes
    -----
    extra : float
        Not a parameter: it is in another section.
    """

    speed: float = field(default=1.0, metadata={"unit": "s", "doc": "Speed."})
    mode: str = field(default="fast", metadata={"choices": ("fast", "steady"), "doc": "Mode."})
    count: int = field(default=3, metadata={"doc": "How many."})
    size: float = field(default=1.0, metadata={"unit": "m", "doc": "Size."})
    label: float = field(default=0.0, metadata={"doc": "A label."})
    undocumented_plain: int = 0     # no metadata: not a described setting


def test_drift_between_the_docstring_and_the_metadata_is_found():
    problems = docstring_problems(Drifted)
    by_field = {p.split(":")[0] for p in problems}
    assert by_field == {"gone", "speed", "mode", "count", "size", "label"}, problems
    assert any("'s'" in p for p in problems if p.startswith("speed"))
    assert any("('fast', 'steady')" in p for p in problems if p.startswith("mode"))
    assert "extra" not in documented_parameters(Drifted)


def test_computed_defaults_are_described_and_only_they():
    for f in dataclasses.fields(PlanSettings):
        text = f.metadata.get("default_text")
        assert bool(text) == (f.default is None), f"{f.name}: default {f.default!r}, default_text {text!r}"
        # the default belongs in its own cell of the README table, not in the one-line meaning
        assert "(default" not in f.metadata["doc"].lower(), f.name
        assert "\n" not in f.metadata["doc"], f.name
