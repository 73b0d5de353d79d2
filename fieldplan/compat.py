"""Earlier import paths keep working: the flat module names, and ``actuators`` for ``fieldplan.actuators``.

fieldplan was one flat package; its modules now live in sub-packages (:data:`MOVED_MODULES`), and the
built-in actuators, once the top-level package ``actuators``, install as ``fieldplan.actuators``.
:func:`install` puts a finder first on ``sys.meta_path`` that imports an earlier name as the module it
moved to (the same module object, so monkeypatching either name patches both) and, in a source
checkout that is not installed, finds ``fieldplan.actuators`` in the checkout's ``actuators/`` folder.
The name ``actuators`` is only taken over while no other distribution provides it. New code uses the
current paths.
"""

from __future__ import annotations

import importlib
import importlib.abc
import importlib.machinery
import importlib.util
import os
import sys
import types

__all__ = ["MOVED_MODULES", "current_name", "install"]


#: Earlier module paths (the package was flat) -> where the module lives now. ``import
#: fieldplan.steer`` and ``from fieldplan.plan import plan`` keep working and give the same module
#: objects (no copies, so monkeypatching either name patches both). The built-in actuators were the
#: top-level package ``actuators``; that name keeps meaning them unless another distribution owns it.
MOVED_MODULES = {
    "fieldplan.medium": "fieldplan.world.medium", "fieldplan.body": "fieldplan.world.body",
    "fieldplan.physics": "fieldplan.world.physics", "fieldplan.workspace": "fieldplan.world.workspace",
    "fieldplan.simulate": "fieldplan.world.simulate",
    "fieldplan.actuator": "fieldplan.contract.actuator", "fieldplan.schedule": "fieldplan.contract.schedule",
    "fieldplan.registry": "fieldplan.contract.registry", "fieldplan.testing": "fieldplan.contract.testing",
    "fieldplan.routes": "fieldplan.planning.routes", "fieldplan.control": "fieldplan.planning.step",
    "fieldplan.plan": "fieldplan.planning.plan", "fieldplan.live": "fieldplan.planning.live",
    "fieldplan.steer": "fieldplan.analysis", "fieldplan.steer_plots": "fieldplan.plots.steerability",
    "fieldplan.tracking": "fieldplan.calibration.tracking", "fieldplan.calibrate": "fieldplan.calibration.calibrate",
    "fieldplan.compare": "fieldplan.workflows.compare", "fieldplan.export": "fieldplan.workflows.export",
    "fieldplan.design": "fieldplan.workflows.design",
}

# A source checkout keeps the built-in actuators in the top-level actuators/ folder; an install maps
# it to fieldplan.actuators (pyproject ``package-dir``). Run from a checkout that is not installed,
# this folder is used.
_HERE = os.path.dirname(os.path.abspath(__file__))   # the fieldplan package folder
_CHECKOUT_ACTUATORS = os.path.join(os.path.dirname(_HERE), "actuators")


def _checkout_actuators():
    pyproject = os.path.join(os.path.dirname(_HERE), "pyproject.toml")
    if not os.path.isfile(os.path.join(_CHECKOUT_ACTUATORS, "__init__.py")) or not os.path.isfile(pyproject):
        return None
    with open(pyproject, encoding="utf-8") as fh:
        return _CHECKOUT_ACTUATORS if 'name = "fieldplan"' in fh.read() else None


class _MovedModuleFinder(importlib.abc.MetaPathFinder, importlib.abc.Loader):
    """Import an earlier module path as the module it moved to; find ``fieldplan.actuators`` in a checkout."""

    def find_spec(self, name, path=None, target=None):
        if name in MOVED_MODULES:
            return importlib.util.spec_from_loader(name, self)
        if name == "fieldplan.actuators":
            return self._actuators_spec(name, path, target)
        if (name == "actuators" or name.startswith("actuators.")) and self._actuators_is_ours():
            return importlib.util.spec_from_loader(name, self)
        return None

    def _actuators_spec(self, name, path, target):
        for finder in sys.meta_path:
            if finder is not self and hasattr(finder, "find_spec"):
                spec = finder.find_spec(name, path, target)
                if spec is not None:
                    return spec            # installed: the package inside fieldplan, or an editable mapping
        folder = _checkout_actuators()
        if folder is None:
            return None
        return importlib.util.spec_from_file_location(name, os.path.join(folder, "__init__.py"),
                                                      submodule_search_locations=[folder])

    def _actuators_is_ours(self):
        other = importlib.machinery.PathFinder.find_spec("actuators")
        if other is None:
            return importlib.util.find_spec("fieldplan.actuators") is not None
        ours = importlib.util.find_spec("fieldplan.actuators")
        mine = {os.path.realpath(p) for p in (ours.submodule_search_locations or ())} if ours else set()
        theirs = {os.path.realpath(p) for p in (other.submodule_search_locations or ())}
        return bool(theirs) and theirs <= mine

    def create_module(self, spec):
        return None

    def exec_module(self, module):
        # The import system returns what sys.modules holds after this call: the real module.
        name = module.__name__
        sys.modules[name] = importlib.import_module(MOVED_MODULES.get(name) or "fieldplan." + name)


def current_name(target):
    """A ``module:attr`` target (an entry point of an older install, a scenario's ``type``) in current paths.

    Examples
    --------
    >>> current_name("actuators.magnetic:CoilArray"), current_name("fieldplan.testing:SourceArray")
    ('fieldplan.actuators.magnetic:CoilArray', 'fieldplan.contract.testing:SourceArray')
    """
    module, sep, attr = target.partition(":")
    module = module.strip()
    if module == "actuators" or module.startswith("actuators."):
        module = "fieldplan." + module
    else:
        for old in sorted(MOVED_MODULES, key=len, reverse=True):
            if module == old or module.startswith(old + "."):
                module = MOVED_MODULES[old] + module[len(old):]
                break
    return module + sep + attr


class _Package(types.ModuleType):
    # ``import fieldplan.plan`` (the earlier module path) would set the attribute ``fieldplan.plan``
    # to that module, hiding the function ``fieldplan.plan``; functions keep their names.
    lazy = {}

    def __setattr__(self, name, value):
        if isinstance(value, types.ModuleType) and f"{self.__name__}.{name}" in MOVED_MODULES and name in self.lazy:
            return
        super().__setattr__(name, value)


def install(package, lazy=()):
    """Put the finder first on ``sys.meta_path`` (once) and keep ``package``'s lazy names from being hidden."""
    if not any(isinstance(f, _MovedModuleFinder) for f in sys.meta_path):
        sys.meta_path.insert(0, _MovedModuleFinder())   # before path finders: an old file of the same name never wins
    package.__class__ = _Package
    _Package.lazy = dict(lazy)
