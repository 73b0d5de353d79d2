"""The package layout holds: no import cycles among fieldplan modules, actuators reached only through the registry.

Both tests read the source with ``ast`` (no import is executed), so they see every module,
including ones no other test imports.
"""

import ast
import pathlib

import networkx as nx
import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "fieldplan"


def _modules():
    """module name -> (path, is_package) for every module of the fieldplan source tree."""
    out = {}
    for p in sorted(PACKAGE.rglob("*.py")):
        rel = p.relative_to(ROOT).with_suffix("")
        parts = list(rel.parts)
        is_pkg = parts[-1] == "__init__"
        if is_pkg:
            parts = parts[:-1]
        out[".".join(parts)] = (p, is_pkg)
    return out


def _imports(name, path, is_pkg, module_level_only):
    """(absolute module name, imported names) of each import statement of a module."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = name if is_pkg else name.rpartition(".")[0]
    nodes = []
    if module_level_only:
        # Statements run at import: the module body, including its if/try blocks, not function bodies.
        stack = list(tree.body)
        while stack:
            n = stack.pop()
            if isinstance(n, (ast.Import, ast.ImportFrom)):
                nodes.append(n)
            elif isinstance(n, (ast.If, ast.Try, ast.With)):
                for field in ("body", "orelse", "finalbody", "handlers"):
                    for c in getattr(n, field, []) or []:
                        stack.extend(c.body if isinstance(c, ast.ExceptHandler) else [c])
    else:
        nodes = [n for n in ast.walk(tree) if isinstance(n, (ast.Import, ast.ImportFrom))]
    for n in nodes:
        if isinstance(n, ast.Import):
            for a in n.names:
                yield a.name, ()
        else:
            if n.level:
                base = package.split(".")
                base = base[:len(base) - (n.level - 1)]
                mod = ".".join(base + ([n.module] if n.module else []))
            else:
                mod = n.module
            yield mod, tuple(a.name for a in n.names)


def _import_graph():
    mods = _modules()
    g = nx.DiGraph()
    g.add_nodes_from(mods)
    for name, (path, is_pkg) in mods.items():
        own = {".".join(name.split(".")[:k]) for k in range(1, name.count(".") + 2)}
        for mod, names in _imports(name, path, is_pkg, module_level_only=True):
            targets = [mod] + [f"{mod}.{n}" for n in names if f"{mod}.{n}" in mods]
            for t in targets:
                if t not in mods:
                    continue
                # Importing a.b.c first runs the packages a.b and a (those the importer is not inside).
                parts = t.split(".")
                for k in range(2, len(parts) + 1):
                    step = ".".join(parts[:k])
                    if step in mods and step not in own and step != name:
                        g.add_edge(name, step)
    return g


def test_the_tree_is_read():
    g = _import_graph()
    assert {"fieldplan.world.body", "fieldplan.contract.actuator", "fieldplan.planning.controller",
            "fieldplan.scenario.load", "fieldplan.cli"} <= set(g)
    assert g.has_edge("fieldplan.contract.actuator", "fieldplan.world.body")


def _cycles(g):
    """Every simple cycle of an import graph, as lists of module names (empty when there is none)."""
    return [c for c in nx.simple_cycles(g)]


def test_the_cycle_check_finds_a_cycle():
    # The check below must be able to fail: on a graph with a cycle it reports it.
    g = nx.DiGraph([("a", "b"), ("b", "c"), ("c", "a"), ("c", "d")])
    assert [sorted(c) for c in _cycles(g)] == [["a", "b", "c"]]


def test_no_import_cycle_among_fieldplan_modules():
    cycles = _cycles(_import_graph())
    assert cycles == [], ("import cycles among fieldplan modules (module-level imports): "
                          + "; ".join(" -> ".join(c + c[:1]) for c in cycles)
                          + ". Move the shared piece to the lower layer, or import where it is used with a reason.")


def test_no_private_name_is_imported_across_modules():
    # A name with a leading underscore is its module's own business; another module that needs it
    # should get a public name (issue: "private names imported across modules").
    offenders = []
    for name, (path, is_pkg) in _modules().items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and (node.level or (node.module or "").startswith("fieldplan")):
                offenders += [f"{name}:{node.lineno} imports {a.name} from {node.module or '.'}"
                              for a in node.names if a.name.startswith("_") and not a.name.startswith("__")]
    assert offenders == [], offenders


def test_only_the_registry_imports_the_actuators():
    # Physics lives in the actuator packages; fieldplan reaches them only through entry points
    # (fieldplan.contract.registry), so a third-party actuator is never a second-class citizen.
    offenders = []
    for name, (path, is_pkg) in _modules().items():
        if name in ("fieldplan.contract.registry",) or name.startswith("fieldplan.actuators"):
            continue
        for mod, names in _imports(name, path, is_pkg, module_level_only=False):
            if mod == "actuators" or mod.startswith("actuators.") or mod == "fieldplan.actuators" \
                    or mod.startswith("fieldplan.actuators.") or (mod == "fieldplan" and "actuators" in names):
                offenders.append(f"{name} imports {mod}")
    assert not offenders, offenders


def test_pyproject_installs_every_package_folder():
    import tomllib

    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    folders = {".".join(p.parent.relative_to(ROOT).parts) for p in PACKAGE.rglob("__init__.py")}
    assert set(cfg["packages"]) == folders | {"fieldplan.actuators"}
    assert cfg["package-dir"] == {"fieldplan.actuators": "actuators"}
    entry = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]["entry-points"]
    assert all(v.startswith("fieldplan.") for v in entry["fieldplan.actuators"].values())


#: The layers, bottom first (README "Package layout"): a module imports only from its own layer and those before it.
LAYERS = ["fieldplan.errors", "fieldplan.compat", "fieldplan.units", "fieldplan.fileio", "fieldplan.result", "fieldplan.progress",
          "fieldplan.world", "fieldplan.contract", "fieldplan.planning", "fieldplan.analysis",
          "fieldplan.calibration", "fieldplan.plots", "fieldplan.scenario", "fieldplan.workflows", "fieldplan.lab",
          "fieldplan.cli", "fieldplan"]


def _layer(module):
    for k, top in enumerate(LAYERS):
        if module == top or module.startswith(top + "."):
            return k
    raise AssertionError(f"{module} is in no layer of LAYERS")


def test_modules_import_only_from_their_layer_and_below():
    # Foundation modules (errors .. progress) count as one layer.
    def rank(m):
        return min(_layer(m), 5) if _layer(m) <= 5 else _layer(m)

    g = _import_graph()
    upward = [f"{a} -> {b}" for a, b in g.edges if rank(b) > rank(a)]
    assert not upward, upward
