"""Schema keys from dataclass fields: a field's unit, meaning and allowed values live in its metadata.

A dataclass the scenario reads (``PlanSettings``, ``Body``, ``ChannelLimit``, ...) describes each
field once, where it is declared::

    period: float | None = field(default=None, metadata={"unit": "s", "doc": "Control period."})

:func:`field_keys` turns those fields into the :class:`Key` rows of :data:`~fieldplan.scenario.SCHEMA`,
so the reader, ``fieldplan schema`` and the README reference all follow the dataclass
(:func:`settings_table_markdown` and :func:`key_row_markdown` render the README's parts;
:func:`update_readme` rewrites them). Metadata keys read here:

``unit``
    SI unit in pint syntax (``"s"``, ``"kg/m^3"``); ``<unit>`` stands for the unit of the channel a
    limit belongs to (``"<unit>/s"``). A field with a unit is read as a quantity.
``doc``
    One line: what the field means.
``default_text``
    What a ``None`` default becomes when it is computed (``"each body's radius"``).
``choices``
    The allowed values of a text field.
``kind``
    Overrides the kind inferred from the annotation: ``vector3`` (three numbers in ``unit``),
    ``section`` (a nested mapping), ``map`` (name -> mapping).

The kind is otherwise inferred from the annotation (``bool``, ``int``, ``float``, ``str``, each
optionally ``| None``). Values are still checked by the dataclass's own ``__post_init__``.

Examples
--------
>>> from dataclasses import dataclass, field
>>> @dataclass
... class Pump:
...     rate: float = field(default=1e-9, metadata={"unit": "m^3/s", "doc": "Flow rate."})
...     mode: str = field(default="push", metadata={"choices": ("push", "pull"), "doc": "Direction."})
>>> [(k.name, k.kind, k.unit, k.default) for k in field_keys(Pump)]
[('rate', 'quantity', 'm^3/s', 1e-09), ('mode', 'choice', None, 'push')]
"""

from __future__ import annotations

import dataclasses
import pathlib
import typing
from dataclasses import dataclass

from ..planning.settings import PlanSettings

__all__ = ["Key", "field_keys", "channel_unit", "CHANNEL_UNIT", "settings_table_markdown", "key_row_markdown",
           "update_readme", "SETTINGS_TABLE_BEGIN", "SETTINGS_TABLE_END"]

#: Placeholder in a unit for the unit of the channel a limit belongs to.
CHANNEL_UNIT = "<unit>"

#: Marker lines around the generated planner settings table in the README.
SETTINGS_TABLE_BEGIN = "<!-- settings-table:begin -->"
SETTINGS_TABLE_END = "<!-- settings-table:end -->"

_KINDS = {"bool": "bool", "int": "int", "float": "number", "str": "str"}


@dataclass(frozen=True)
class Key:
    """One key of a section: its type, SI unit, default and meaning.

    Parameters
    ----------
    name : str
        The key as written in a scenario file.
    kind : str
        quantity | number | int | bool | str | choice | vector3 | point | shape | list | section | map | any.
    unit : str, optional
        SI unit (pint syntax) of a quantity; may contain :data:`CHANNEL_UNIT`.
    default : object
        Value used when the key is absent.
    doc : str
        One line for the reference.
    required : bool
        The key must be given.
    choices : tuple
        Allowed values of a ``choice``.
    field : str, optional
        Name of the dataclass field this key sets (``None`` for a key of the file format only).
    default_text : str
        What a computed default (``default`` is ``None``) becomes, in words; empty if not given.
    """

    name: str
    kind: str
    unit: str | None = None
    default: object = None
    doc: str = ""
    required: bool = False
    choices: tuple = ()
    field: str | None = None
    default_text: str = ""


def _kind(f):
    meta = f.metadata
    if "kind" in meta:
        return meta["kind"]
    if meta.get("choices"):
        return "choice"
    if meta.get("unit"):
        return "quantity"
    if isinstance(f.type, str):
        # Annotations are text under ``from __future__ import annotations``: "float | None".
        parts = [p.strip() for p in f.type.split("|")]
    else:
        parts = [getattr(a, "__name__", str(a)) for a in (typing.get_args(f.type) or (f.type,))]
    parts = [p for p in parts if p not in ("None", "NoneType")]
    return _KINDS.get(parts[0], "any") if len(parts) == 1 else "any"


def _default(f):
    if f.default is not dataclasses.MISSING:
        return f.default, False
    if f.default_factory is not dataclasses.MISSING:
        return f.default_factory(), False
    return None, True


def field_keys(cls, *, rename=None, skip=()):
    """The fields of dataclass ``cls`` as schema keys, in declaration order.

    Parameters
    ----------
    cls : type
        A dataclass whose fields carry ``unit``, ``doc``, ``choices`` and ``kind`` metadata (all
        optional).
    rename : dict of str to str, optional
        Field name -> key name in a scenario file (``{"name": "kind"}`` for bodies).
    skip : sequence of str
        Fields a scenario file does not set under their own name.

    Returns
    -------
    list of Key
        One per field not skipped; a field without a default is ``required``.
    """
    rename = dict(rename or {})
    out = []
    for f in dataclasses.fields(cls):
        if f.name in skip:
            continue
        default, required = _default(f)
        meta = f.metadata
        out.append(Key(rename.get(f.name, f.name), _kind(f), meta.get("unit"), default, meta.get("doc", ""),
                       required, tuple(meta.get("choices", ())), f.name, meta.get("default_text", "")))
    return out


def channel_unit(unit, channel):
    """``unit`` with :data:`CHANNEL_UNIT` replaced by the unit ``channel`` of a channel.

    Examples
    --------
    >>> channel_unit("<unit>", "A"), channel_unit("<unit>/s", "A"), channel_unit("s", "A")
    ('A', '(A)/s', 's')
    """
    if unit is None or CHANNEL_UNIT not in unit:
        return unit
    if unit == CHANNEL_UNIT:
        return channel
    return unit.replace(CHANNEL_UNIT, f"({channel})")


# -- the README's generated parts ----------------------------------------------------------------

def _cell(text):
    # A pipe in a meaning (|f| / |grad f|) would end the table cell.
    return str(text).replace("|", "\\|")


def _default_cell(key):
    if key.required:
        return "**required**"
    if key.default_text:
        return _cell(key.default_text)
    v = key.default
    if v is None:
        return ""
    if isinstance(v, bool):
        return f"`{str(v).lower()}`"           # as a scenario file (YAML) spells it
    if isinstance(v, float):
        return f"`{v:g}`"
    return f"`{v}`"


def settings_table_markdown(cls, *, skip=()):
    """The fields of dataclass ``cls`` as a Markdown table: setting, default, unit, meaning.

    Every cell comes from the field (its default, or its ``default_text`` metadata when the default
    is computed) and its metadata, so the README table cannot say other than the code.

    Parameters
    ----------
    cls : type
        A dataclass whose fields carry metadata (see the module docstring).
    skip : sequence of str
        Fields left out.

    Returns
    -------
    str
        The table, one line per field, ending in a newline.

    Examples
    --------
    >>> from dataclasses import dataclass, field
    >>> @dataclass
    ... class Pump:
    ...     rate: float | None = field(default=None, metadata={
    ...         "unit": "m^3/s", "default_text": "from the tube", "doc": "Flow rate."})
    ...     mode: str = field(default="push", metadata={"choices": ("push", "pull"), "doc": "Direction."})
    >>> print(settings_table_markdown(Pump), end="")
    | setting | default | unit | meaning |
    |---|---|---|---|
    | `rate` | from the tube | m^3/s | Flow rate. |
    | `mode` | `push` |  | Direction. Values: `push`, `pull`. |
    """
    lines = ["| setting | default | unit | meaning |", "|---|---|---|---|"]
    for k in field_keys(cls, skip=skip):
        meaning = _cell(k.doc)
        if k.choices:
            meaning += " Values: " + ", ".join(f"`{c}`" for c in k.choices) + "."
        lines.append(f"| `{k.name}` | {_default_cell(k)} | {k.unit or ''} | {meaning} |")
    return "\n".join(lines) + "\n"


def key_row_markdown(section, keys, *, fields_note=""):
    """One row of the README's key table: the section and its keys, each with its unit or choices.

    Parameters
    ----------
    section : str
        The section as the table names it (``"planner"``).
    keys : sequence of Key
        Its keys; those of the file format only (``field`` is ``None``) come first.
    fields_note : str
        Words between those and the keys that set dataclass fields (``"any PlanSettings field"``).

    Returns
    -------
    str
        The row, without a newline.

    Examples
    --------
    >>> keys = [Key("mode", "choice", choices=("a", "b")), Key("period", "quantity", "s", field="period"),
    ...         Key("horizon", "int", field="horizon")]
    >>> key_row_markdown("planner", keys, fields_note="any setting")
    '| `planner` | `mode` (a \\\\| b) and any setting: `period` (s), `horizon` |'
    """
    def item(k):
        extra = " \\| ".join(k.choices) if k.choices else (k.unit or "")
        return f"`{k.name}`" + (f" ({extra})" if extra else "")

    own = ", ".join(item(k) for k in keys if k.field is None)
    of_fields = ", ".join(item(k) for k in keys if k.field is not None)
    if of_fields and fields_note:
        of_fields = f"{fields_note}: {of_fields}"
    text = " and ".join(t for t in (own, of_fields) if t)
    return f"| `{section}` | {text} |"


def readme_parts():
    """The README's generated parts: ``(planner settings table, {section: key-table row})``.

    The rows are those of ``planner``, ``simulation`` and ``outputs``, whose keys are dataclass fields.
    """
    # deferred import: import cycle: fieldplan.scenario.schema imports this module to build its tables
    from .schema import SCHEMA  # noqa: PLC0415

    table = settings_table_markdown(PlanSettings)
    note = 'any `PlanSettings` field (see "Planner settings" above; `fieldplan schema` lists each with its unit and default)'
    rows = {"planner": key_row_markdown("planner", SCHEMA["planner"], fields_note=note)}
    # simulation and outputs are SimulationSettings / OutputSettings fields only: no format keys to set apart
    rows.update({s: key_row_markdown(s, SCHEMA[s]) for s in ("simulation", "outputs")})
    return table, rows


def refresh_readme(text, table, rows):
    """``text`` with the settings table between its markers and each key-table row replaced.

    Parameters
    ----------
    text : str
        The README.
    table : str
        What goes between :data:`SETTINGS_TABLE_BEGIN` and :data:`SETTINGS_TABLE_END`.
    rows : dict of str to str
        Section -> its row; the line starting ``| `section` |`` is replaced.

    Returns
    -------
    str

    Raises
    ------
    ValueError
        If a marker or a row is missing, or appears more than once.

    Examples
    --------
    >>> text = "a\\n<!-- settings-table:begin -->\\nold\\n<!-- settings-table:end -->\\n| `x` | old |\\n"
    >>> print(refresh_readme(text, "new\\n", {"x": "| `x` | new |"}), end="")
    a
    <!-- settings-table:begin -->
    new
    <!-- settings-table:end -->
    | `x` | new |
    """
    for marker in (SETTINGS_TABLE_BEGIN, SETTINGS_TABLE_END):
        if text.count(marker) != 1:
            raise ValueError(f"the README must hold the line {marker!r} once, found it {text.count(marker)} times.")
    head, rest = text.split(SETTINGS_TABLE_BEGIN + "\n", 1)
    _, tail = rest.split(SETTINGS_TABLE_END, 1)
    lines = (head + SETTINGS_TABLE_BEGIN + "\n" + table + SETTINGS_TABLE_END + tail).split("\n")
    for section, row in rows.items():
        at = [i for i, ln in enumerate(lines) if ln.startswith(f"| `{section}` |")]
        if len(at) != 1:
            raise ValueError(f"the README's key table must have one row for `{section}`, found {len(at)}.")
        lines[at[0]] = row
    return "\n".join(lines)


def update_readme(path):
    """Rewrite the generated parts of the README at ``path`` from the dataclasses; True if it changed.

    Run after changing a planner setting's metadata::

        python -c "import fieldplan.scenario.fields as f; f.update_readme('README.md')"
    """
    p = pathlib.Path(path)
    old = p.read_text(encoding="utf-8")
    new = refresh_readme(old, *readme_parts())
    if new != old:
        p.write_text(new, encoding="utf-8")
    return new != old
