"""YAML with line numbers, read safely: plain data only, bounded size, depth and aliases, the line of every key.

The resource limits (:data:`MAX_FILE_CHARS`, :data:`MAX_BODIES`, ...) bound what any scenario file can make
fieldplan do; a file beyond one is refused with the line concerned.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass

import yaml

from ..errors import ScenarioError
from .schema import MISSING

__all__ = ['MAX_FILE_CHARS', 'MAX_DEPTH', 'MAX_NODES', 'MAX_ALIAS_NODES', 'MAX_BODIES', 'MAX_OBSTACLES',
           'MAX_OBSTACLE_VERTICES', 'MAX_DPI', 'MAX_TRIALS', 'PROGRESS_OBSTACLES', 'PROGRESS_VALUES',
           'MAX_REPEATED_WARNINGS', 'YamlDoc', 'key_string', 'read_yaml']

# ----------------------------------------------------------------------------------------------
# YAML with line numbers
# ----------------------------------------------------------------------------------------------

#: Resource limits on a scenario file, so that no file can make reading it use unbounded memory or
#: time (each is documented in the README; a file beyond one is refused with the line concerned).
MAX_FILE_CHARS = 16_000_000     # size of the file, characters
MAX_DEPTH = 64                  # nesting depth of lists and mappings (after alias expansion)
MAX_NODES = 500_000             # YAML values (scalars, lists, mappings), aliases expanded
MAX_ALIAS_NODES = 100_000       # values reached through aliases (``*name``), in total
MAX_BODIES = 1_000              # bodies in one scenario (sum of the counts)
MAX_OBSTACLES = 50_000          # obstacles in one workspace
MAX_OBSTACLE_VERTICES = 3_000_000   # polygon vertices of all obstacles (a circle is 129)
MAX_DPI = 1200                  # outputs.dpi
MAX_TRIALS = 100_000            # simulation.trials (every trial's trajectory is kept)

PROGRESS_OBSTACLES = 2_000     # show a progress bar (on a terminal) from this many obstacles
PROGRESS_VALUES = 50_000       # ... and from this many YAML values while reading
MAX_REPEATED_WARNINGS = 10     # one warning each for this many, then one summary


class _TooBig(Exception):
    """A resource limit of the YAML reader was reached (line 1-based, message)."""

    def __init__(self, line, message):
        super().__init__(message)
        self.line, self.message = line, message


class _Bounds:
    """Nesting-depth and node-count bounds while composing (PyYAML composes recursively, so a deeply
    nested file would otherwise end in RecursionError)."""

    def _init_bounds(self, max_depth, max_nodes, bar=None):
        self._depth, self._nodes = 0, 0
        self._max_depth, self._max_nodes = max_depth, max_nodes
        self._bar = bar

    def compose_node(self, parent, index):
        self._depth += 1
        self._nodes += 1
        if self._bar is not None and self._nodes % 4096 == 0:
            self._bar.update(4096)
        try:
            if self._depth > self._max_depth:
                raise _TooBig(self.peek_event().start_mark.line + 1,
                              f"lists and mappings are nested more than {self._max_depth} deep "
                              "(fieldplan.scenario.MAX_DEPTH).")
            if self._nodes > self._max_nodes:
                raise _TooBig(self.peek_event().start_mark.line + 1,
                              f"the file holds more than {self._max_nodes} values (fieldplan.scenario.MAX_NODES).")
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


class _BoundedLoader(_Bounds, yaml.SafeLoader):
    """PyYAML's pure-Python safe loader, bounded; its error messages are the clearest."""

    def __init__(self, text, max_depth, max_nodes):
        yaml.SafeLoader.__init__(self, text)
        self._init_bounds(max_depth, max_nodes)


try:
    from yaml._yaml import CParser as _CParser
except ImportError:  # PyYAML built without libyaml
    _CParser = None

if _CParser is not None:
    class _FastBoundedLoader(_Bounds, yaml.composer.Composer, _CParser, yaml.constructor.SafeConstructor,
                             yaml.resolver.Resolver):
        """libyaml's parser (several times faster on long obstacle lists) under the bounded Python composer."""

        def __init__(self, text, max_depth, max_nodes, bar=None):
            _CParser.__init__(self, text)
            yaml.composer.Composer.__init__(self)
            yaml.constructor.SafeConstructor.__init__(self)
            yaml.resolver.Resolver.__init__(self)
            self._init_bounds(max_depth, max_nodes, bar)


def _prescan(text, max_depth, max_nodes, max_alias):
    """Check the size limits on the parser's event stream, before any node is built.

    Returns the number of values (aliases expanded), or None for malformed YAML. Every
    collection's expanded size (values inside it, aliases counted at the size of their anchor)
    and height are tracked in one pass, so an alias bomb or a huge or deeply nested file is refused
    in about a second (libyaml parses; only counters are kept). Malformed YAML is left to the reader.
    """
    parser = _CParser(text)
    stack = []                 # per open collection: [size, height, anchor]
    anchors = {}               # anchor -> (size, height)
    nodes = alias = 0

    def close(size, height, anchor, mark, own):
        nonlocal nodes
        if anchor is not None:
            anchors[anchor] = (size, height)
        if stack:
            stack[-1][0] += size
            stack[-1][1] = max(stack[-1][1], height + 1)
            if len(stack) + height > max_depth:
                raise _TooBig(mark.line + 1, f"lists and mappings are nested more than {max_depth} deep once "
                                             "aliases are expanded (fieldplan.scenario.MAX_DEPTH).")
        nodes += own
        if nodes > max_nodes:
            raise _TooBig(mark.line + 1, f"the file expands to more than {max_nodes} values "
                                         "(fieldplan.scenario.MAX_NODES).")

    try:
        while True:
            ev = parser.get_event()
            if ev is None or isinstance(ev, yaml.StreamEndEvent):
                break
            if isinstance(ev, (yaml.SequenceStartEvent, yaml.MappingStartEvent)):
                if len(stack) >= max_depth:
                    raise _TooBig(ev.start_mark.line + 1, f"lists and mappings are nested more than {max_depth} "
                                                          "deep (fieldplan.scenario.MAX_DEPTH).")
                stack.append([1, 0, ev.anchor])
            elif isinstance(ev, (yaml.SequenceEndEvent, yaml.MappingEndEvent)):
                size, height, anchor = stack.pop()
                close(size, max(height, 1), anchor, ev.start_mark, 1)
            elif isinstance(ev, yaml.ScalarEvent):
                close(1, 0, ev.anchor, ev.start_mark, 1)
            elif isinstance(ev, yaml.AliasEvent):
                size, height = anchors.get(ev.anchor, (1, 0))
                alias += size
                if alias > max_alias:
                    raise _TooBig(ev.start_mark.line + 1, f"aliases (*name) expand to more than {max_alias} "
                                                          "values (fieldplan.scenario.MAX_ALIAS_NODES).")
                close(size, height, None, ev.start_mark, size)
    except yaml.YAMLError:
        return None            # the reader reports malformed YAML with its own message
    finally:
        parser.dispose()
    return nodes


def _merged_size(node, memo):
    """Number of key/value pairs a mapping has once its ``<<`` merge keys are expanded (memoised)."""
    key = id(node)
    if key in memo:
        return memo[key]
    memo[key] = 0                      # a merge cycle counts as nothing rather than recursing forever
    total = 0
    for kn, vn in node.value:
        if kn.tag == "tag:yaml.org,2002:merge":
            subs = vn.value if isinstance(vn, yaml.SequenceNode) else [vn]
            total += sum(_merged_size(m, memo) for m in subs if isinstance(m, yaml.MappingNode))
        else:
            total += 1
    memo[key] = total
    return total


# Tags of plain data; anything else (!!python/..., !!binary, timestamps) is refused.
_PLAIN_TAGS = {f"tag:yaml.org,2002:{t}" for t in ("str", "int", "float", "bool", "null", "seq", "map")}

# PyYAML follows YAML 1.1, where "1e-6" (no dot) is a string; users mean a number.
_EXP_FLOAT = re.compile(r"^[-+]?(\d+\.?\d*|\.\d+)[eE][-+]?\d+$")


@dataclass
class YamlDoc:
    """A parsed YAML document with the line (1-based) of every key and list item.

    Attributes
    ----------
    data : object
        Plain Python data (dicts, lists, scalars), as ``yaml.safe_load`` would give, except that
        mapping keys are always the key's text and ``1e-6`` style scalars are floats.
    lines : dict
        Path tuple (keys and list indices) -> line number.
    file : str
        Name used in messages.
    text : str
        The source text.
    """

    data: object
    lines: dict
    file: str
    text: str

    def line(self, path):
        """Line of ``path``, or of its nearest ancestor that has one."""
        path = tuple(path)
        while path:
            if path in self.lines:
                return self.lines[path]
            path = path[:-1]
        return self.lines.get((), 1)


def key_string(path):
    """``("bodies", 0, "radius")`` -> ``"bodies[0].radius"``."""
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            out += ("." if out else "") + str(p)
    return out


def _nearest_key(text, line):
    """The last ``key:`` at or above ``line`` (1-based) in raw text, for syntax-error messages."""
    lines = text.splitlines()
    for i in range(min(line, len(lines)) - 1, -1, -1):
        m = re.match(r"^\s*-?\s*([A-Za-z_][\w\-]*)\s*:", lines[i])
        if m:
            return m.group(1)
    return "(top level)"


def read_yaml(text, file="<scenario>", progress=False):
    """Parse YAML ``text`` with the safe loader, keeping the line of every key.

    Reading is bounded (:data:`MAX_DEPTH`, :data:`MAX_NODES`, :data:`MAX_ALIAS_NODES`): an alias
    bomb or a deeply nested file is refused with its line after a bounded amount of work.

    Parameters
    ----------
    text : str
        YAML source.
    file : str
        Name used in error messages.
    progress : bool
        Show a progress bar while a long file is read.

    Returns
    -------
    YamlDoc

    Raises
    ------
    ScenarioError
        Malformed YAML (with the line and the nearest key), more than one document, a duplicate
        key in a mapping, or a resource limit reached.

    Examples
    --------
    >>> doc = read_yaml("a:\\n  b: 5 um\\n  c: [1, 2]\\n")
    >>> doc.data, doc.line(("a", "c", 1))
    ({'a': {'b': '5 um', 'c': [1, 2]}}, 3)
    """
    max_depth, max_nodes, max_alias = MAX_DEPTH, MAX_NODES, MAX_ALIAS_NODES
    problems = []
    loader, node, early = None, MISSING, None
    bar = None
    if _CParser is not None:
        try:
            total = _prescan(text, max_depth, max_nodes, max_alias)
        except _TooBig as exc:
            total, early = None, exc
        if progress and total and total >= PROGRESS_VALUES:
            from tqdm.auto import tqdm  # noqa: PLC0415

            bar = tqdm(total=total, desc=f"reading {os.path.basename(file)}", unit=" values", leave=False)
        loader = _FastBoundedLoader(text, max_depth, max_nodes, bar)
        try:
            if early is None:
                node = loader.get_single_node()
        except yaml.YAMLError:
            # Re-read with the pure-Python parser: its messages and marks are the ones users see.
            loader.dispose()
            loader = None
        except _TooBig as exc:
            early = exc
        finally:
            if bar is not None:
                bar.close()
    if loader is None:
        loader = _BoundedLoader(text, max_depth, max_nodes)

    def too_big(line, message):
        return ScenarioError([(file, line, _nearest_key(text, line or 1),
                               f"{message} Scenario files are limited so that reading one cannot exhaust memory "
                               "or time; simplify the file (see the README's limits).")])

    try:
        try:
            if early is not None:
                raise early
            if node is MISSING:
                node = loader.get_single_node()
        except _TooBig as exc:
            raise too_big(exc.line, exc.message) from None
        except RecursionError:
            raise too_big(None, "the file is nested too deeply to read.") from None
        except yaml.MarkedYAMLError as exc:
            # The context mark is where the broken construct began (an unclosed bracket, a key
            # missing its colon); the problem mark is where the parser noticed. Point at the first.
            mark = exc.context_mark or exc.problem_mark
            line = mark.line + 1 if mark is not None else None
            what = exc.problem or str(exc)
            ctx = f" ({exc.context})" if exc.context else ""
            noticed = ""
            if exc.problem_mark is not None and exc.context_mark is not None and \
                    exc.problem_mark.line != exc.context_mark.line:
                noticed = f", noticed on line {exc.problem_mark.line + 1}"
            raise ScenarioError([(file, line, _nearest_key(text, line or 1),
                                  f"malformed YAML: {what}{ctx}{noticed}. Check indentation, colons, quotes and "
                                  "brackets on this line or the one above.")]) from None
        except yaml.YAMLError as exc:
            raise ScenarioError([(file, None, "(document)", f"cannot read YAML: {exc}")]) from None
        lines = {}
        if node is None:
            return YamlDoc(None, {(): 1}, file, text)
        lines[()] = node.start_mark.line + 1
        seen = set()
        count = {"nodes": 0, "alias": 0}
        merge_memo = {}

        def walk(n, path, via_alias=False):
            # A node met a second time is an alias (*name) being expanded: bound the total work.
            via_alias = via_alias or id(n) in seen
            seen.add(id(n))
            count["nodes"] += 1
            if via_alias:
                count["alias"] += 1
                if count["alias"] > max_alias:
                    raise _TooBig(n.start_mark.line + 1, f"aliases (*name) expand to more than {max_alias} values "
                                                         "(fieldplan.scenario.MAX_ALIAS_NODES).")
            if count["nodes"] > max_nodes:
                raise _TooBig(n.start_mark.line + 1, f"the file expands to more than {max_nodes} values "
                                                     "(fieldplan.scenario.MAX_NODES).")
            if len(path) > max_depth:
                raise _TooBig(n.start_mark.line + 1, f"lists and mappings are nested more than {max_depth} deep "
                                                     "once aliases are expanded (fieldplan.scenario.MAX_DEPTH).")
            if n.tag not in _PLAIN_TAGS:
                problems.append((file, n.start_mark.line + 1, key_string(path) or "(top level)",
                                 f"YAML tag {n.tag!r} is not allowed: scenario files hold plain data only "
                                 "(numbers, text, lists, mappings)."))
                return None
            if isinstance(n, yaml.MappingNode):
                if any(kn.tag == "tag:yaml.org,2002:merge" for kn, _ in n.value) and \
                        _merged_size(n, merge_memo) > max_alias:
                    raise _TooBig(n.start_mark.line + 1, f"merge keys (<<) expand to more than {max_alias} entries "
                                                         "(fieldplan.scenario.MAX_ALIAS_NODES).")
                loader.flatten_mapping(n)
                out = {}
                for kn, vn in n.value:
                    if not isinstance(kn, yaml.ScalarNode):
                        problems.append((file, kn.start_mark.line + 1, key_string(path),
                                         "mapping keys must be plain names, not lists or mappings."))
                        continue
                    key = kn.value
                    kpath = path + (key,)
                    if key in out:
                        problems.append((file, kn.start_mark.line + 1, key_string(kpath),
                                         f"duplicate key {key!r} (first given on line {lines[kpath]}); "
                                         "give each key once."))
                        continue
                    lines[kpath] = kn.start_mark.line + 1
                    out[key] = walk(vn, kpath, via_alias)
                return out
            if isinstance(n, yaml.SequenceNode):
                out = []
                for i, vn in enumerate(n.value):
                    lines[path + (i,)] = vn.start_mark.line + 1
                    out.append(walk(vn, path + (i,), via_alias))
                return out
            value = loader.construct_object(n, deep=True)
            if isinstance(value, str) and not n.style and _EXP_FLOAT.match(value.strip()):
                value = float(value)
            return value

        try:
            data = walk(node, ())
        except _TooBig as exc:
            raise too_big(exc.line, exc.message) from None
    finally:
        loader.dispose()
    if problems:
        raise ScenarioError(problems)
    return YamlDoc(data, lines, file, text)
