"""The check files: each validated against its source, its measure, window, baseline, guard and
life cycle typed and checked, every problem with its file and line."""

from __future__ import annotations

import difflib
from pathlib import Path
from typing import Any

import duckdb

from toolkit.config.fields import Section
from toolkit.config.registry import (BASELINE_KEYS, BASELINES, CHECK_KEYS, GUARD_KEYS, LIFECYCLE_KEYS, MEASURE_KEYS,
                                     MEASURES, WINDOW_KEYS)
from toolkit.config.schema import Binder
from toolkit.config.expressions import unknown_column
from toolkit.config.yamlsource import Located, load
from toolkit.model import Baseline, Check, Guard, Lifecycle, Measure, Project, Source, Window
from toolkit.problems import Problem, display_path
from toolkit.runlength import H_LIMIT, ChainError, interval_table


def load_checks(folder: Path, sources: dict[str, Source], con: duckdb.DuckDBPyConnection,
                 problems: list[Problem]) -> dict[str, Check]:
    checks: dict[str, Check] = {}
    first_seen: dict[str, str] = {}
    for file in sorted([*folder.glob("*.yml"), *folder.glob("*.yaml")]):
        shown = display_path(file)
        doc, found = load(file, shown)
        problems += found
        if doc is None:
            continue
        check = load_check(doc, sources, con, problems)
        if check is None:
            continue
        if check.name in checks:
            problems.append(Problem(shown, doc.line(("check",)),
                                    f"duplicate check name '{check.name}' (also in {first_seen[check.name]})"))
            continue
        checks[check.name] = check
        first_seen[check.name] = f"{shown}:{check.line}"
    return checks


def load_check(doc: Located, sources: dict[str, Source], con: duckdb.DuckDBPyConnection,
                problems: list[Problem]) -> Check | None:
    before = len(problems)
    top = Section(doc, (), doc.data if doc.data is not None else {}, CHECK_KEYS, problems)
    name, source_name = top.get("check"), top.get("source")
    about, direction, severity = top.get("about"), top.get("direction"), top.get("severity")
    source = sources.get(source_name) if source_name else None
    if source_name is not None and source is None:
        close = difflib.get_close_matches(source_name, list(sources), n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        top.error(("source",), f"unknown source '{source_name}'{hint}")
    binder = Binder(con, source) if source is not None else None
    where = binder.expr(top, top.get("where"), "where", "boolean") if binder else None
    by = top.get("by") or []
    if binder and source.columns:
        for index, column in enumerate(by):
            parts = [p.strip() for p in column.strip("[]").split(",")]
            if column not in source.columns and len(parts) > 1 and all(p in source.columns for p in parts):
                top.error(("by", index), f"by: '{column}' reads as one column name; write a list: "
                                         f"[{', '.join(parts)}]")
            elif column not in source.columns:
                top.error(("by", index), f"by: {unknown_column(column, source.columns)} in source '{source.name}'")
    attributes = top.get("attributes") or (source.attributes if source is not None else [])
    if binder and source.columns:
        for index, column in enumerate(top.get("attributes") or []):
            if column not in source.columns:
                top.error(("attributes", index),
                          f"attributes: {unknown_column(column, source.columns)} in source '{source.name}'")
    measure = _measure(doc, top.get("measure"), binder, problems)
    window = _window(doc, top.get("window"), problems)
    baseline = _baseline(doc, top.get("baseline"), measure, problems, direction)
    guard_s = Section(doc, ("guard",), top.get("guard") or {}, GUARD_KEYS, problems)
    guard = Guard(guard_s.get("min_sessions"), guard_s.get("min_bad"))
    if measure is not None and measure.kind != "rate" and "min_bad" in guard_s.raw:
        guard_s.error(("guard", "min_bad"), f"guard.min_bad applies to rate measures, not {measure.kind}")
    life_s = Section(doc, ("lifecycle",), top.get("lifecycle") or {}, LIFECYCLE_KEYS, problems)
    lifecycle = Lifecycle(life_s.get("recover_after"), life_s.get("expire_after"), life_s.get("reopen_within"))
    if measure is not None and measure.split and set(by) & {measure.split}:
        top.error(("measure", "split"), f"measure.split: '{measure.split}' is already in 'by'")
    if baseline is not None and baseline.method == "peers":
        _peers(top, baseline, by, window)
    if len(problems) > before or None in (name, source, measure, window, baseline):
        return None
    return Check(
        name=name, about=about, source=source, where=where, by=tuple(by), measure=measure,
        direction=direction, window=window, baseline=baseline, guard=guard,
        lifecycle=lifecycle, severity=severity, file=doc.file, line=doc.line(("check",)),
        attributes=tuple(attributes),
    )


def _measure(doc: Located, raw: Any, binder: Binder | None, problems: list[Problem]) -> Measure | None:
    if raw is None:
        return None
    kind_name = raw.get("kind") if isinstance(raw, dict) else None
    kind = MEASURES.get(kind_name) if isinstance(kind_name, str) else None
    section = Section(doc, ("measure",), raw, MEASURE_KEYS + (kind.keys if kind else ()), problems)
    if section.get("kind") is None or kind is None:
        return None
    values: dict[str, Any] = {"kind": kind.name}
    for key in kind.keys:
        value = section.get(key.name)
        if binder is None:
            continue
        if key.type == "expr":
            want = "boolean" if key.name == "bad" else "number"
            value = binder.expr(section, value, key.name, want)
        elif key.type == "column":
            value = binder.column(section, value, key.name)
        values[key.name] = value
    unit = values.get("unit")
    if unit is not None and (not unit.strip() or len(unit) > 16 or not unit.isprintable()):
        section.error(("measure", "unit"), "measure.unit: write a short unit such as ms, kbps or % "
                                           "(at most 16 characters, no line breaks)")
        return None
    if any(values.get(k.name) is None for k in kind.keys if k.required):
        return None
    return Measure(**values)


def _window(doc: Located, raw: Any, problems: list[Problem]) -> Window | None:
    if raw is None:
        return None
    section = Section(doc, ("window",), raw, WINDOW_KEYS, problems)
    given = set(section.raw)
    if "sessions" in given and "every" in given:
        section.error(("window", "every"), "window: give either 'sessions' (count window) or 'every' (time window), not both")
        return None
    if "sessions" in given:
        if "lateness" in given:
            section.error(("window", "lateness"), "window.lateness applies to time windows ('every'), not count windows")
        sessions, max_wait = section.get("sessions"), section.get("max_wait")
        if "max_wait" not in given:
            section.error(("window",), "missing key 'max_wait' in window: a count window needs it so quiet series still close")
        return Window(sessions=sessions, max_wait=max_wait) if sessions and max_wait else None
    if "every" in given:
        if "max_wait" in given:
            section.error(("window", "max_wait"), "window.max_wait applies to count windows ('sessions'), not time windows")
        every, lateness = section.get("every"), section.get("lateness")
        if every is not None and every.total_seconds() <= 0:
            section.error(("window", "every"), "window.every must be longer than 0s")
            return None
        return Window(every=every, lateness=lateness) if every and lateness is not None else None
    section.error(("window",), "window needs 'sessions' (count window) or 'every' (time window)")
    return None


def _baseline(doc: Located, raw: Any, measure: Measure | None, problems: list[Problem],
              direction: str | None = "up") -> Baseline | None:
    if raw is None:
        return None
    method_name = raw.get("method") if isinstance(raw, dict) else None
    method = BASELINES.get(method_name) if isinstance(method_name, str) else None
    section = Section(doc, ("baseline",), raw, BASELINE_KEYS + (method.keys if method else ()), problems)
    if section.get("method") is None or method is None:
        return None
    values = {key.name: section.get(key.name) for key in method.keys}
    if method.rate_only and measure is not None and measure.kind != "rate":
        section.error(("baseline", "method"), f"baseline.method: {method.name} applies to rate measures, not {measure.kind}")
        return None
    if values.get("confidence") is not None and measure is not None and measure.kind != "rate":
        section.error(("baseline", "confidence"),
                      f"baseline.confidence applies to rate measures (a Wilson bound), not {measure.kind}")
        return None
    if method.name == "cusum" and not _cusum_fits(section, values, direction):
        return None
    if values.get("history") and values.get("min_history") and values["min_history"] > values["history"]:
        section.error(("baseline", "min_history"),
                      f"baseline.min_history ({values['min_history']}) cannot exceed history ({values['history']})")
        return None
    if any(values.get(k.name) is None for k in method.keys if k.required):
        return None
    renamed = {("lam" if k == "lambda" else k): v for k, v in values.items() if v is not None}
    if "peers_by" in renamed:
        renamed["peers_by"] = tuple(renamed["peers_by"])
    return Baseline(method=method.name, **renamed)


def _cusum_fits(section: Section, values: dict[str, Any], direction: str | None) -> bool:
    """A CUSUM baseline's keys make sense together, and its decision intervals can be computed."""
    shift, sessions = values.get("shift"), values.get("in_control_sessions")
    if direction == "down":
        section.error(("baseline", "method"), "baseline.method: cusum detects a rise of the rate (direction: up), not a fall")
        return False
    if shift is not None and shift <= 1:
        section.error(("baseline", "shift"), f"baseline.shift must be above 1 (the rate to detect is shift × p0), got {shift}")
        return False
    if shift is None or sessions is None:
        return True
    try:
        interval_table(float(shift), int(sessions))
    except ChainError:
        section.error(("baseline", "in_control_sessions"),
                      f"baseline.in_control_sessions: {sessions} sessions at shift {shift} needs a decision "
                      f"interval above h = {H_LIMIT} for some p0; give a larger shift or fewer sessions")
        return False
    return True


def _peers(top: Section, baseline: Baseline, by: list[str], window: Window | None) -> None:
    """A peers baseline compares series that share some of `by` over one common time window."""
    shared = baseline.peers_by
    if window is not None and window.kind == "count":
        top.error(("baseline", "method"), "baseline.method: peers compares series over the same time window; "
                  "count windows (window.sessions) share no common time: use window.every")
    outside = [c for c in shared if c not in by]
    if outside:
        hints = [difflib.get_close_matches(c, by, n=1) for c in outside]
        said = ", ".join(f"{c!r}" + (f" (did you mean '{h[0]}'?)" if h else "") for c, h in zip(outside, hints))
        top.error(("baseline", "peers_by"), f"baseline.peers_by: {said} not in 'by'")
    elif not shared or len(shared) >= len(by):
        top.error(("baseline", "peers_by"), "baseline.peers_by must name some of the columns of 'by', not none "
                  "and not all: a series' peers share those and differ in the rest")


def validate_check(project: Project, doc: Located) -> tuple[Check | None, list[Problem]]:
    """One check document validated against the project's sources exactly as a check file is.

    For a check file's mapping changed in memory (a backtest's overrides): the same rules, the same
    messages, and the problems returned rather than raised so the caller can say where they came from.
    """
    problems: list[Problem] = []
    con = duckdb.connect()
    try:
        check = load_check(doc, project.sources, con, problems)
    finally:
        con.close()
    return check, problems
