"""YAML loading that remembers the line of every key, so validation can point at it.

PyYAML's composer gives nodes with marks; this module turns them into plain Python values plus a
map from key path (``("measure", "bad")``) to line number. Duplicate keys are refused: YAML would
silently keep the last one, which hides mistakes.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
import re
from typing import Any

import yaml

from .problems import Problem

KeyPath = tuple[str | int, ...]


@dataclass
class Located:
    """A loaded YAML document and the line (1-based) of each key path in it."""

    file: str
    data: Any
    lines: dict[KeyPath, int] = field(default_factory=dict)

    def line(self, path: KeyPath) -> int:
        """Line of ``path``, or of its nearest ancestor that has one."""
        while path:
            if path in self.lines:
                return self.lines[path]
            path = path[:-1]
        return self.lines.get((), 1)


class _Loader(yaml.SafeLoader):
    """SafeLoader without YAML 1.1's yes/no/on/off booleans, which turn country codes into bools."""


_Loader.yaml_implicit_resolvers = {
    first: [(tag, rx) for tag, rx in resolvers if tag != "tag:yaml.org,2002:bool"]
    for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()
}
_Loader.add_implicit_resolver(
    "tag:yaml.org,2002:bool",
    re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"),
    list("tTfF"),
)


def load(path: Path, shown: str) -> tuple[Located | None, list[Problem]]:
    """Load one YAML file; on a syntax error return the problem with its line instead."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        return None, [Problem(shown, 0, f"cannot read file: {err}")]
    try:
        node = yaml.compose(text, Loader=_Loader)
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        line = mark.line + 1 if mark else 0
        return None, [Problem(shown, line, f"YAML syntax: {err.problem or err}")]
    located = Located(shown, None, {(): 1})
    problems: list[Problem] = []
    if node is None:
        located.data = None
        return located, problems
    located.data = _convert(node, (), located, problems)
    return located, problems


def parse_value(text: str) -> Any:
    """One value written on a command line (``2``, ``0.5``, ``3d``, ``[site, cdn]``), read as YAML.

    The same loader as check files, so a value means on the command line what it means in a file.
    """
    return yaml.load(text, Loader=_Loader)


def _convert(node: yaml.Node, path: KeyPath, located: Located, problems: list[Problem]) -> Any:
    located.lines.setdefault(path, node.start_mark.line + 1)
    if isinstance(node, yaml.MappingNode):
        out: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            key = _scalar(key_node)
            if not isinstance(key, str):
                problems.append(
                    Problem(located.file, key_node.start_mark.line + 1, f"keys must be text, not {key!r}")
                )
                continue
            child = (*path, key)
            if key in out:
                problems.append(
                    Problem(located.file, key_node.start_mark.line + 1, f"duplicate key '{dotted(child)}'")
                )
                continue
            located.lines[child] = key_node.start_mark.line + 1
            out[key] = _convert(value_node, child, located, problems)
        return out
    if isinstance(node, yaml.SequenceNode):
        items = []
        for index, item in enumerate(node.value):
            child = (*path, index)
            located.lines[child] = item.start_mark.line + 1
            items.append(_convert(item, child, located, problems))
        return items
    return _scalar(node)


def _scalar(node: yaml.Node) -> Any:
    """A scalar's Python value by the loader's resolvers; a non-scalar key comes back as the node."""
    if not isinstance(node, yaml.ScalarNode):
        return node
    return _Loader("").construct_object(node, deep=True)


def dotted(path: KeyPath) -> str:
    """``("measure", "bad")`` as ``measure.bad``, the way messages name a key."""
    return ".".join(str(p) for p in path)
