"""Schema keys from dataclass fields: a field's unit, meaning and allowed values live in its metadata.

A dataclass the scenario reads (``PlanSettings``, ``Body``, ``ChannelLimit``, ...) describes each
field once, where it is declared::

    period: float | None = field(default=None, metadata={"unit": "s", "doc": "Control period."})

:func:`field_keys` turns those fields into the :class:`Key` rows of :data:`~fieldplan.scenario.SCHEMA`,
so the reader, ``fieldplan schema`` and the README reference all follow the dataclass. Metadata keys
read here:

``unit``
    SI unit in pint syntax (``"s"``, ``"kg/m^3"``); ``<unit>`` stands for the unit of the channel a
    limit belongs to (``"<unit>/s"``). A field with a unit is read as a quantity.
``doc``
    One line: what the field means (and its default when that is computed).
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
import typing
from dataclasses import dataclass

__all__ = ["Key", "field_keys", "channel_unit", "CHANNEL_UNIT"]

#: Placeholder in a unit for the unit of the channel a limit belongs to.
CHANNEL_UNIT = "<unit>"

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
    """

    name: str
    kind: str
    unit: str | None = None
    default: object = None
    doc: str = ""
    required: bool = False
    choices: tuple = ()
    field: str | None = None


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
                       required, tuple(meta.get("choices", ())), f.name))
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
