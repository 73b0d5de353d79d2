"""Discovery of actuator models: entry points in group ``fieldplan.actuators``, or ``module:Class``.

This is the only module of fieldplan that may import from the ``actuators`` package (through
entry points, like any third-party plug-in). Importing a module runs its code, so a scenario file's
``module:Class`` is imported only if the module is a registered plug-in (or fieldplan's own), or the
user allowed it (``--allow-module``, or ``allow_modules`` in their configuration file).
"""

from __future__ import annotations

import difflib
import os
from importlib.metadata import entry_points

from ..compat import current_name
from ..errors import ActuatorError
from .actuator import Actuator

__all__ = ["available_actuators", "load_actuator_class", "load_actuator", "is_registered_module",
           "user_allowed_modules"]

GROUP = "fieldplan.actuators"


def available_actuators():
    """Registered actuator names and their ``module:attr`` targets, dict.

    Targets are given in current module paths, also when an older install registered them under
    earlier ones (:func:`fieldplan.compat.current_name`).
    """
    return {ep.name: current_name(ep.value) for ep in entry_points(group=GROUP)}


def _config_path():
    env = os.environ.get("FIELDPLAN_CONFIG")
    if env:
        return env
    base = os.environ.get("XDG_CONFIG_HOME") or os.path.join(os.path.expanduser("~"), ".config")
    return os.path.join(base, "fieldplan", "config.yaml")


def user_allowed_modules():
    """Modules the user's own configuration allows scenarios to import.

    The file is ``$FIELDPLAN_CONFIG``, else ``$XDG_CONFIG_HOME/fieldplan/config.yaml`` (default
    ``~/.config/fieldplan/config.yaml``), a YAML mapping with ``allow_modules: [name, ...]``. A missing
    file allows nothing.

    Returns
    -------
    tuple of (str, str)
        ``(module, config file)`` per entry.

    Raises
    ------
    ActuatorError
        The file exists but is not such a mapping.
    """
    path = _config_path()
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read(1_000_000)
    except FileNotFoundError:
        return ()
    except (OSError, UnicodeDecodeError) as exc:
        raise ActuatorError(f"{path}: cannot read the fieldplan configuration ({exc}).") from None
    import yaml  # noqa: PLC0415

    try:
        data = yaml.safe_load(text) or {}
    except yaml.YAMLError as exc:
        raise ActuatorError(f"{path}: the fieldplan configuration is not valid YAML ({exc}).") from None
    mods = data.get("allow_modules", []) if isinstance(data, dict) else None
    if not isinstance(mods, list) or not all(isinstance(m, str) and m for m in mods):
        raise ActuatorError(f"{path}: expected a mapping with 'allow_modules: [module, ...]' (module names).")
    return tuple((m, path) for m in mods)


def is_registered_module(module):
    """Whether ``module`` is fieldplan's own or the module of a registered plug-in (imported without asking)."""
    if module == "fieldplan" or module.startswith("fieldplan."):
        return True
    return any(current_name(ep.value).partition(":")[0] == current_name(module) for ep in entry_points(group=GROUP))


def _allowed_by(module, allow):
    """Why importing ``module`` is allowed (text), or None; ``allow`` as in :func:`load_actuator_class`."""
    if is_registered_module(module):
        return "a registered plug-in"
    if allow is True:
        return "named in code"

    def covers(entry):
        return module == entry or module.startswith(entry + ".")

    for entry in allow or ():
        if covers(entry):
            return f"allowed by --allow-module {entry}"
    for entry, path in user_allowed_modules():
        if covers(entry):
            return f"allowed by {path}"
    return None


def load_actuator_class(name, *, allow_modules=True, on_import=None):
    """The actuator class (or factory) registered as ``name``, or named ``"module:Class"``.

    Parameters
    ----------
    name : str
        Registered name or ``"module:Class"``.
    allow_modules : True or sequence of str
        ``True`` (the default, for a caller naming the class in its own code): import any module.
        A sequence (what scenario files get): import a module that is not a registered plug-in only
        if it, or a package holding it, is listed here or in the user's configuration
        (:func:`user_allowed_modules`) — importing a module runs its code.
    on_import : callable, optional
        ``on_import(module, origin, reason)`` is called before such a module is imported, with the
        file it will be imported from.

    Raises
    ------
    ActuatorError
        Unknown name (with the registered names and a close match), module not allowed or not
        importable, or the target not an :class:`Actuator` class or factory.
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
        why = _allowed_by(module, allow_modules)
        if why is None:
            raise ActuatorError(
                f"actuator {name!r}: module {module!r} is not a registered fieldplan plug-in, and importing it "
                f"would run its code. If you trust it, pass --allow-module {module} (or list it under "
                f"allow_modules in {_config_path()}).")
        try:
            mod = _import_user_module(module, on_import if why != "a registered plug-in" else None, why)
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


def _find_without_running(module):
    """The import spec of ``module`` (dotted) found on the path without executing any package code."""
    import importlib.machinery  # noqa: PLC0415
    import importlib.util  # noqa: PLC0415

    parts = module.split(".")
    try:
        spec = importlib.util.find_spec(parts[0])
        for k in range(1, len(parts)):
            if spec is None or not spec.submodule_search_locations:
                return None
            spec = importlib.machinery.PathFinder.find_spec(".".join(parts[:k + 1]),
                                                            list(spec.submodule_search_locations))
    except (ImportError, ValueError):
        return None
    return spec


def _import_user_module(module, on_import=None, why=""):
    # A user's own model usually sits beside their scenario, in the folder they run from: look there
    # too, as `python -m` would, without leaving the folder on sys.path afterwards.
    import importlib.util  # noqa: PLC0415
    import sys  # noqa: PLC0415

    def load():
        if on_import is not None and module not in sys.modules:
            spec = _find_without_running(module)
            if spec is None:
                raise ImportError(f"No module named {module!r}")
            origin = spec.origin if spec.origin not in (None, "namespace") else \
                ", ".join(spec.submodule_search_locations or ())
            on_import(module, origin, why)
        return importlib.import_module(module)

    try:
        return load()
    except ImportError:
        cwd = os.getcwd()
        if cwd in sys.path:
            raise
        sys.path.insert(0, cwd)
        try:
            return load()
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
