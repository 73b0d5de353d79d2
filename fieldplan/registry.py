"""Discovery of actuator models: entry points in group ``fieldplan.actuators``, or ``module:Class``.

This is the only module of fieldplan that may import from the ``actuators`` package (through
entry points, like any third-party plug-in).
"""

from __future__ import annotations

import difflib
import importlib
from importlib.metadata import entry_points

from .actuator import Actuator
from .errors import ActuatorError

__all__ = ["available_actuators", "load_actuator_class", "load_actuator"]

GROUP = "fieldplan.actuators"


def available_actuators():
    """Registered actuator names and their ``module:attr`` targets, dict."""
    return {ep.name: ep.value for ep in entry_points(group=GROUP)}


def load_actuator_class(name):
    """The actuator class (or factory) registered as ``name``, or named ``"module:Class"``.

    Raises
    ------
    ActuatorError
        Unknown name (with the registered names and a close match), module not importable, or
        the target not an :class:`Actuator` class or factory.
    """
    if not isinstance(name, str) or not name:
        raise ActuatorError(f"actuator type must be a non-empty string, got {name!r}.")
    eps = {ep.name: ep for ep in entry_points(group=GROUP)}
    if name in eps:
        try:
            return eps[name].load()
        except Exception as exc:  # noqa: BLE001 - a broken plug-in is reported, not raised raw
            raise ActuatorError(f"actuator {name!r} ({eps[name].value}) failed to load: {exc}") from exc
    if ":" in name:
        module, _, attr = name.partition(":")
        try:
            mod = _import_user_module(module)
        except ImportError as exc:
            raise ActuatorError(
                f"actuator {name!r}: cannot import module {module!r} ({exc}). The module must be installed "
                "or importable from the current folder (or a folder on PYTHONPATH).") from exc
        try:
            obj = getattr(mod, attr)
        except AttributeError:
            raise ActuatorError(f"actuator {name!r}: module {module!r} has no attribute {attr!r}.") from None
        if isinstance(obj, type) and not issubclass(obj, Actuator):
            raise ActuatorError(f"actuator {name!r}: {attr} is not a subclass of fieldplan.Actuator.")
        return obj
    close = difflib.get_close_matches(name, list(eps), n=1)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    raise ActuatorError(f"unknown actuator {name!r}; registered: {sorted(eps)}, or give 'module:Class'.{hint}")


def _import_user_module(module):
    # A user's own model usually sits beside their scenario, in the folder they run from: look there
    # too, as `python -m` would, without leaving the folder on sys.path afterwards.
    import os
    import sys

    try:
        return importlib.import_module(module)
    except ImportError:
        cwd = os.getcwd()
        if cwd in sys.path:
            raise
        sys.path.insert(0, cwd)
        try:
            return importlib.import_module(module)
        finally:
            sys.path.remove(cwd)


def load_actuator(name, **params):
    """Build the actuator ``name`` with keyword ``params``; see :func:`load_actuator_class`."""
    cls = load_actuator_class(name)
    try:
        act = cls(**params)
    except TypeError as exc:
        raise ActuatorError(f"actuator {name!r}: bad parameters ({exc}).") from exc
    if not isinstance(act, Actuator):
        raise ActuatorError(f"actuator {name!r} did not produce a fieldplan.Actuator.")
    return act
