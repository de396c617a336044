"""The one place where names and values become SQL text.

Every identifier that reaches a query passes through :func:`quote_ident`; every constant that cannot
be a bound parameter passes through :func:`quote_literal`. Both are registered as template filters.
"""

from __future__ import annotations

from datetime import datetime, timedelta


def quote_ident(name: str) -> str:
    """Quote a column or table name for DuckDB: double quotes, embedded quotes doubled."""
    if not isinstance(name, str) or name == "":
        raise ValueError(f"not an identifier: {name!r}")
    if "\x00" in name:
        raise ValueError("identifiers cannot contain NUL")
    return '"' + name.replace('"', '""') + '"'


def quote_literal(value: object) -> str:
    """Render a constant as a SQL literal (strings, numbers, booleans, None, timestamps)."""
    if value is None:
        return "NULL"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if value != value or value in (float("inf"), float("-inf")):
            raise ValueError(f"not a finite number: {value!r}")
        return repr(value)
    if isinstance(value, datetime):
        return f"TIMESTAMP '{value.isoformat(sep=' ')}'"
    if isinstance(value, timedelta):
        return interval(value)
    if isinstance(value, str):
        if "\x00" in value:
            raise ValueError("strings cannot contain NUL")
        return "'" + value.replace("'", "''") + "'"
    raise TypeError(f"no SQL literal for {type(value).__name__}")


_UNITS = (("day", 86400), ("hour", 3600), ("minute", 60), ("second", 1))


def interval(delta: timedelta) -> str:
    """Render a duration as the largest whole-unit INTERVAL literal, e.g. ``INTERVAL 3 DAY``."""
    seconds = int(delta.total_seconds())
    if seconds != delta.total_seconds() or seconds < 0:
        raise ValueError(f"durations are whole, non-negative seconds: {delta!r}")
    for unit, size in _UNITS:
        if seconds % size == 0:
            return f"INTERVAL {seconds // size} {unit.upper()}"
    raise AssertionError("unreachable: seconds always divide")
