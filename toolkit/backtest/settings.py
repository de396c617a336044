"""Backtest settings: overrides of check keys (``--set [CHECK:]KEY=VALUE``, ``--setting 'K=V, …'``),
parsed from the command line and applied to copies of the check files, which are validated exactly as
the files are."""

from __future__ import annotations

import copy
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from toolkit.config.checks import validate_check
from toolkit.config.yamlsource import Located, Refused, dotted, load, parse_value
from toolkit.model import Check, Project
from toolkit.problems import PlimsollError, Problem, ProjectInvalid


class BacktestError(PlimsollError):
    """The backtest was asked for something it cannot do (a time range, a --keep folder); exit 2."""

    exit_code = 2


@dataclass(frozen=True)
class Override:
    """``[CHECK:]dotted.key=value``: one key of the check files replaced (``null`` removes it)."""

    text: str
    path: tuple[str, ...]
    value: Any
    check: str | None = None  # only this check; None: every backtested check


@dataclass(frozen=True)
class Setting:
    """One row of the comparison: the checks with these overrides (none: the baseline)."""

    overrides: tuple[Override, ...] = ()
    option: str = "--set"  # how it was given, for messages

    @property
    def label(self) -> str:
        return ", ".join(o.text for o in self.overrides) or "baseline"


def parse_override(text: str, option: str = "--set") -> Override:
    """Read ``[CHECK:]KEY.PATH=VALUE``; the value is YAML, as it would be in the check file."""
    where = f"{option} {text}"
    key, sep, raw = text.partition("=")
    key = key.strip()
    if not sep or not key:
        raise _invalid(where, "expected KEY=VALUE, e.g. baseline.factor=2 (or CHECK:KEY=VALUE for one check)")
    check, colon, key = key.rpartition(":") if ":" in key else (None, "", key)
    path = tuple(part.strip() for part in key.split("."))
    if colon and not check:
        raise _invalid(where, "a check name must come before ':'")
    if not all(path):
        raise _invalid(where, f"'{key}' is not a dotted key such as baseline.factor")
    if path[0] == "check":
        raise _invalid(where, "the check's name cannot be overridden; backtest it under its own name")
    try:
        value = parse_value(raw.strip())
    except Refused as err:
        shown = where if len(where) <= 80 else where[:77] + "..."  # a hostile value can be megabytes
        raise _invalid(shown, f"the value is refused: {err}") from None
    except yaml.YAMLError as err:
        raise _invalid(where, f"the value is not valid YAML: {str(err).splitlines()[0]}") from None
    return Override(f"{check + ':' if check else ''}{'.'.join(path)}={raw.strip()}", path, value, check)


def parse_setting(text: str, option: str = "--setting") -> Setting:
    """``'KEY=VALUE, KEY=VALUE'``: commas inside brackets, parentheses or quotes do not separate."""
    parts = [p.strip() for p in split_top_level(text)]
    if not any(parts):
        raise _invalid(f"{option} {text!r}", "expected one or more KEY=VALUE, separated by commas")
    return Setting(tuple(parse_override(p, option) for p in parts if p), option)


def split_top_level(text: str) -> list[str]:
    """Split on commas that are not inside (), [], {} or a quoted string."""
    parts, depth, quote, current = [], 0, "", []
    for ch in text:
        if quote:
            quote = "" if ch == quote else quote
        elif ch in "'\"":
            quote = ch
        elif ch in "([{":
            depth += 1
        elif ch in ")]}":
            depth = max(depth - 1, 0)
        elif ch == "," and depth == 0:
            parts.append("".join(current))
            current = []
            continue
        current.append(ch)
    parts.append("".join(current))
    return parts


def settings_from(assignments: Sequence[str], settings: Sequence[str]) -> list[Setting]:
    """The command line's settings: every ``--set`` together forms one, each ``--setting`` one more."""
    found = []
    if assignments:
        found.append(Setting(tuple(parse_override(a) for a in assignments), "--set"))
    found += [parse_setting(s) for s in settings]
    return found


def apply_setting(project: Project, checks: list[Check], setting: Setting) -> list[Check]:
    """The checks with the setting's overrides, each re-validated as if its file said so."""
    names = [c.name for c in checks]
    for o in setting.overrides:
        if o.check is not None and o.check not in names:
            raise _invalid(f"{setting.option} {o.text}",
                           f"no check named '{o.check}' among those backtested ({', '.join(names)})")
    return [_variant(project, check, setting) for check in checks]


def _variant(project: Project, check: Check, setting: Setting) -> Check:
    mine = [o for o in setting.overrides if o.check in (None, check.name)]
    if not mine:
        return check
    where = f"{setting.option} {setting.label}"
    doc, problems = load(project.checks_dir / Path(check.file).name, check.file)
    if doc is None or problems:
        raise ProjectInvalid(problems)
    data = copy.deepcopy(doc.data)
    for o in mine:
        _assign(data, o, where, check.name)
    changed, problems = validate_check(project, Located(doc.file, data, doc.lines))
    if problems or changed is None:
        raise ProjectInvalid([Problem(where, 0, f"check {check.name}: {p.message}") for p in problems]
                             or [Problem(where, 0, f"check {check.name}: not valid with these overrides")])
    return changed


def _assign(data: dict[str, Any], override: Override, where: str, check: str) -> None:
    node = data
    for depth, part in enumerate(override.path[:-1], start=1):
        child = node.setdefault(part, {})
        if not isinstance(child, dict):
            raise _invalid(where, f"check {check}: '{dotted(override.path[:depth])}' is not a mapping, "
                                  f"so it has no key '{override.path[depth]}'")
        node = child
    if override.value is None:
        node.pop(override.path[-1], None)
    else:
        node[override.path[-1]] = override.value


def _invalid(where: str, message: str) -> ProjectInvalid:
    return ProjectInvalid([Problem(where, 0, message)])
