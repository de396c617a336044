"""The generic YAML checker: a mapping validated against its key table, each value typed
(durations, sizes, names, choices), every problem kept with the line of its key."""

from __future__ import annotations

import difflib
import re
from datetime import timedelta
from typing import Any

from toolkit.config.registry import Key
from toolkit.config.yamlsource import KeyPath, Located, dotted
from toolkit.problems import Problem


_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$")


_UNITS = {"B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
          "KiB": 2**10, "MiB": 2**20, "GiB": 2**30, "TiB": 2**40}


NAME = re.compile(r"^[a-z][a-z0-9_]*$")


PLAIN_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


ENV_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


_DURATION = re.compile(r"^(?:(\d+)w)?(?:(\d+)d)?(?:(\d+)h)?(?:(\d+)m)?(?:(\d+)s)?$")


def parse_duration(text: Any) -> timedelta:
    """``90m``, ``2h``, ``3d``, ``1w``, ``1h30m``: a whole number of seconds or more; a bare ``0`` is
    no time at all, as it reads in any unit."""
    if not isinstance(text, bool) and isinstance(text, (str, int)) and str(text).strip() == "0":
        return timedelta(0)
    match = _DURATION.match(str(text).strip()) if isinstance(text, (str, int)) else None
    if not match or not str(text).strip() or not any(match.groups()):
        raise ValueError(f"bad duration {text!r}: write a number and a unit, e.g. 90m, 2h, 3d, 1w")
    weeks, days, hours, minutes, seconds = (int(g or 0) for g in match.groups())
    return timedelta(weeks=weeks, days=days, hours=hours, minutes=minutes, seconds=seconds)


def duration_text(delta: timedelta) -> str:
    """A duration as ``parse_duration`` reads it: ``30m``, ``1h30m``, ``2d``, ``0s``."""
    seconds = int(delta.total_seconds())
    parts = [(seconds // 86400, "d"), (seconds % 86400 // 3600, "h"), (seconds % 3600 // 60, "m"), (seconds % 60, "s")]
    return "".join(f"{n}{unit}" for n, unit in parts if n) or "0s"


class Section:
    """Validation of one YAML mapping against its key table, collecting problems with lines."""

    def __init__(self, doc: Located, path: KeyPath, value: Any, keys: tuple[Key, ...], problems: list[Problem]):
        self.doc, self.path, self.keys, self.problems = doc, path, {k.name: k for k in keys}, problems
        self.values: dict[str, Any] = {}
        if not isinstance(value, dict):
            self.error(path, f"'{dotted(path) or 'file'}' must be a mapping of keys, not {kind_of(value)}")
            value = {}
        self.raw = value
        for name in value:
            if name not in self.keys:
                self.unknown(name)

    def unknown(self, name: str) -> None:
        close = difflib.get_close_matches(name, list(self.keys), n=1, cutoff=0.6)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        where = f" in {dotted(self.path)}" if self.path else ""
        self.error((*self.path, name), f"unknown key '{name}'{where}{hint}")

    def error(self, path: KeyPath, message: str) -> None:
        self.problems.append(Problem(self.doc.file, self.doc.line(path), message))

    def get(self, name: str) -> Any:
        """The typed value of ``name``, its default, or None after recording a problem."""
        key = self.keys[name]
        path = (*self.path, name)
        if name not in self.raw or self.raw[name] is None:
            if key.required:
                where = f" in {dotted(self.path)}" if self.path else ""
                self.error(self.path, f"missing key '{name}'{where}")
                return None
            return typed(key, key.default) if key.default is not None else None
        try:
            return typed(key, self.raw[name])
        except ValueError as err:
            self.error(path, f"{dotted(path)}: {err}")
            return None


def kind_of(value: Any) -> str:
    return {dict: "a mapping", list: "a list", str: "text", bool: "true/false", int: "a number",
            float: "a number"}.get(type(value), type(value).__name__)


def typed(key: Key, value: Any) -> Any:
    t = key.type
    if t == "bool":
        if not isinstance(value, bool):
            raise ValueError(f"expected true or false, got {kind_of(value)} {value!r}")
        return value
    if t in ("text", "name", "column", "expr", "choice", "envvar"):
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise ValueError(f"expected text, got {kind_of(value)}")
        value = str(value)
        if t == "envvar" and not ENV_NAME.match(value):
            # the value is never repeated: it may be the secret itself, pasted by mistake
            raise ValueError("this is not an environment variable name (letters, digits and _): write the "
                             "variable's name, not its value")
        if t == "name" and not NAME.match(value):
            raise ValueError(f"'{value}' is not a valid name: use [a-z][a-z0-9_]*")
        if t == "choice" and value not in key.choices:
            close = difflib.get_close_matches(value, key.choices, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ValueError(f"'{value}' is not one of {', '.join(key.choices)}{hint}")
        return value
    if t == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"expected a whole number, got {kind_of(value)} {value!r}")
        if key.minimum is not None and value < key.minimum:
            raise ValueError(f"must be at least {int(key.minimum)}, got {value}")
        return value
    if t in ("number", "fraction"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ValueError(f"expected a number, got {kind_of(value)} {value!r}")
        value = float(value)
        if t == "fraction" and not 0 < value < 1:
            raise ValueError(f"must be between 0 and 1 (exclusive), got {value}")
        if key.minimum is not None and value < key.minimum:
            raise ValueError(f"must be at least {key.minimum}, got {value}")
        return value
    if t == "duration":
        return parse_duration(value)
    if t == "columns":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ValueError("expected a list of column names")
        if len(set(value)) != len(value):
            raise ValueError("a column is listed twice")
        return list(value)
    if t == "mapping":
        if not isinstance(value, dict):
            raise ValueError(f"expected a mapping of keys, got {kind_of(value)}")
        return value
    if t == "list":
        if not isinstance(value, list):
            raise ValueError(f"expected a list, got {kind_of(value)}")
        return value
    raise AssertionError(f"unknown key type {t}")


def size_of(top: "Section", name: str) -> int | None:
    """A size such as 4GB or 512MiB, in bytes."""
    text = top.get(name)
    if text is None:
        return None
    match = _SIZE.match(str(text))
    if not match or float(match.group(1)) <= 0:
        top.error((name,), f"{name} '{text}': expected a size such as 4GB or 512MiB")
        return None
    return int(float(match.group(1)) * _UNITS[match.group(2)])
