"""YAML loading that remembers the line of every key, so validation can point at it.

PyYAML's composer gives nodes with marks; this module turns them into plain Python values plus a
map from key path (``("measure", "bad")``) to line number. Duplicate keys are refused: YAML would
silently keep the last one, which hides mistakes.

Every text is screened first, on PyYAML's event stream (which is read without recursion, and which
the screen stops reading at the first refusal): nesting deeper than :data:`MAX_DEPTH`, aliases that
would expand the document by more than :data:`MAX_ALIAS_VALUES` values (anchors nested in anchors)
or refer to a value containing them, and tags other than YAML's standard ones are refused with
their line before anything is composed or built. Check files, ``plimsoll.yml`` and values given on
the command line all pass through here.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
import re
from typing import Any

import yaml

from toolkit.problems import Problem

KeyPath = tuple[str | int, ...]

# A project file or a check nests a few levels and reuses an alias a few times; far beyond these
# bounds a file is an attack or an accident, and expanding or recursing into it would take minutes
# and gigabytes (or end in a traceback) before any message.
MAX_DEPTH = 50
MAX_ALIAS_VALUES = 10_000
_STANDARD_TAGS = frozenset(
    {f"tag:yaml.org,2002:{name}" for name in ("str", "int", "float", "bool", "null", "seq", "map")} | {"!"}
)


class Refused(yaml.YAMLError):
    """YAML this loader will not read, or a value it cannot build, with the line (1-based) where."""

    def __init__(self, line: int, message: str):
        super().__init__(message)
        self.line, self.message = line, message

    def __str__(self) -> str:
        return self.message


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
        node = _compose(text)
    except Refused as err:
        return None, [Problem(shown, err.line, err.message)]
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        line = mark.line + 1 if mark else 0
        return None, [Problem(shown, line, f"YAML syntax: {err.problem or err}")]
    except yaml.reader.ReaderError as err:
        line = text.count("\n", 0, err.position) + 1
        return None, [Problem(shown, line, f"YAML syntax: {_reader_problem(err)}")]
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
    Raises :class:`Refused` for YAML it will not read (see :func:`screen`) or a value it cannot build,
    and another :class:`yaml.YAMLError` for text that is not YAML.
    """
    node = _compose(text)
    if node is None:
        return None
    problems: list[Problem] = []
    value = _convert(node, (), Located("value", None, {(): 1}), problems)
    if problems:
        raise Refused(problems[0].line, problems[0].message)
    return value


def screen(text: str) -> None:
    """Refuse deep nesting, alias bombs, recursive aliases and non-standard tags, with their line.

    Reads the event stream once, keeping per open collection the number of values it would hold
    with every alias written out; an alias adds the size of its anchor's value. Stops at the first
    refusal, so a hostile text costs only what was read up to it.
    """
    open_sizes: list[int] = []
    open_anchors: list[str | None] = []
    sizes: dict[str, int] = {}
    added = 0
    for event in yaml.parse(text, Loader=_Loader):
        line = event.start_mark.line + 1
        tag = getattr(event, "tag", None)
        if tag is not None and tag not in _STANDARD_TAGS:
            raise Refused(line, f"tag {_short_tag(tag)} is not allowed: only YAML's standard tags are read "
                                "(!!str, !!int, !!float, !!bool, !!null, !!seq, !!map)")
        if isinstance(event, yaml.CollectionStartEvent):
            if len(open_sizes) >= MAX_DEPTH:
                raise Refused(line, f"nesting deeper than {MAX_DEPTH} levels is not read; a Plimsoll file "
                                    "needs a few")
            open_sizes.append(1)
            open_anchors.append(event.anchor)
            continue
        if isinstance(event, yaml.CollectionEndEvent):
            size, anchor = open_sizes.pop(), open_anchors.pop()
        elif isinstance(event, yaml.ScalarEvent):
            size, anchor = 1, event.anchor
        elif isinstance(event, yaml.AliasEvent):
            if event.anchor in open_anchors:
                raise Refused(line, f"alias *{event.anchor} refers to a value that contains it")
            size, anchor = sizes.get(event.anchor, 1), None  # an unknown anchor is the composer's error
            added += size
            if added > MAX_ALIAS_VALUES:
                raise Refused(line, f"alias *{event.anchor}: aliases would add more than {MAX_ALIAS_VALUES:,} "
                                    "values to this file (anchors nested in anchors); write the values out")
        else:
            continue
        if anchor is not None:
            sizes[anchor] = size
        if open_sizes:
            open_sizes[-1] += size


def _compose(text: str) -> yaml.Node | None:
    screen(text)
    return yaml.compose(text, Loader=_Loader)


def _short_tag(tag: str) -> str:
    prefix = "tag:yaml.org,2002:"
    return "!!" + tag[len(prefix):] if tag.startswith(prefix) else tag


def _reader_problem(err: yaml.reader.ReaderError) -> str:
    if isinstance(err.character, int):
        return f"character #x{err.character:04x} is not allowed: {err.reason}"
    return str(err.reason)


def _convert(node: yaml.Node, path: KeyPath, located: Located, problems: list[Problem]) -> Any:
    located.lines.setdefault(path, node.start_mark.line + 1)
    if isinstance(node, yaml.MappingNode):
        out: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            if not isinstance(key_node, yaml.ScalarNode):
                kind = "a mapping" if isinstance(key_node, yaml.MappingNode) else "a list"
                problems.append(Problem(located.file, key_node.start_mark.line + 1,
                                        f"keys must be text, not {kind}"))
                continue
            key = _scalar(key_node, located, problems)
            if key is _UNREADABLE:
                continue
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
    value = _scalar(node, located, problems)
    return None if value is _UNREADABLE else value


_UNREADABLE = object()


def _scalar(node: yaml.ScalarNode, located: Located, problems: list[Problem]) -> Any:
    """A scalar's Python value by the loader's resolvers, or _UNREADABLE after recording why
    (``!!int abc``, a date such as ``2026-13-45``)."""
    try:
        return _Loader("").construct_object(node, deep=True)
    except (yaml.YAMLError, ValueError, TypeError, OverflowError) as err:
        reason = getattr(err, "problem", None) or str(err).strip().splitlines()[0]
        problems.append(Problem(located.file, node.start_mark.line + 1,
                                f"cannot read {node.value!r} as {_short_tag(node.tag)}: {reason}"))
        return _UNREADABLE


def dotted(path: KeyPath) -> str:
    """``("measure", "bad")`` as ``measure.bad``, the way messages name a key."""
    return ".".join(str(p) for p in path)
