"""Backtests: replay the lake into a scratch warehouse and score checks, under several settings.

A backtest runs the normal runner, on a copy of the project whose warehouse is a fresh file in a
scratch folder and whose sources stop at ``--to``, so it executes exactly the SQL a run would and
never opens the live warehouse. Each setting (the checks as their files say, then each set of
overrides) gets its own scratch warehouse. Data before ``--from`` only warms up the baselines;
alerts are scored when they open in ``[from, to)``.
"""

from __future__ import annotations

import copy
import json
import shutil
import statistics
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import yaml

from .labels import Label, label_matches, match_label, overlapping
from .model import Check, Project
from .outputs import alerts_from
from .problems import PlimsollError, Problem, ProjectInvalid
from .project import validate_check
from .runner import run, select_checks
from .warehouse import connect
from .yamlsource import Located, Refused, dotted, load, parse_value

Progress = Callable[[str], None]
_DAY = timedelta(days=1)
_SHORT = 32  # a setting's label longer than this is shown as #n in the table, spelt out below it


class BacktestError(PlimsollError):
    """The backtest was asked for something it cannot do (a time range, a --keep folder); exit 2."""

    exit_code = 2


# ── settings: overrides of check keys ────────────────────────────────────────────────────────────


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


# ── scoring against labels ───────────────────────────────────────────────────────────────────────


@dataclass
class Score:
    """What one setting's alerts were worth over ``[start, end)``; label figures None without labels."""

    alerts: int
    per_day: float
    matched: int | None = None      # alerts matching an incident label of their check
    related: int | None = None      # alerts during a labelled incident, of another check or key
    decoys: int | None = None       # alerts matching a decoy
    unlabelled: int | None = None   # alerts matching no label and overlapping no incident
    incidents: int | None = None    # incidents of the scored checks starting in range
    detected: int | None = None     # of those, found by at least one matching alert
    median_delay: timedelta | None = None
    worst_delay: timedelta | None = None
    missed: list[Label] = field(default_factory=list)

    @property
    def precision(self) -> float | None:
        return self.matched / self.alerts if self.matched is not None and self.alerts else None

    @property
    def recall(self) -> float | None:
        return self.detected / self.incidents if self.incidents else None


def score(alerts: list[dict[str, Any]], labels: list[Label] | None, checks: set[str],
          start: datetime, end: datetime) -> Score:
    """Precision, recall and detection delay of the alerts of ``checks`` opened in ``[start, end)``.

    An alert is *matched* when it matches an incident label of its check (same check, the label's
    key pairs in its key, opened between the incident's start and end); only those count for
    precision. Alerts matching a decoy, alerts during some other labelled incident (*related*) and
    alerts matching nothing are all false positives, shown apart so one can see why. Recall counts
    the incidents of ``checks`` that start in range; an incident's delay is from its start to the
    opening of its first matching alert, in data time.
    """
    scored = [a for a in alerts if a["check_name"] in checks and start <= a["opened_at"] < end]
    result = Score(len(scored), len(scored) / ((end - start) / _DAY))
    if labels is None:
        return result
    kinds = [_kind(a, labels) for a in scored]
    result.matched, result.related = kinds.count("matched"), kinds.count("related")
    result.decoys, result.unlabelled = kinds.count("decoy"), kinds.count("unlabelled")
    incidents = [lab for lab in labels
                 if lab.kind == "incident" and lab.check in checks and start <= lab.start < end]
    delays = []
    for incident in incidents:
        opened = [a["opened_at"] for a in scored if label_matches(a, incident)]
        if opened:
            delays.append(min(opened) - incident.start)
        else:
            result.missed.append(incident)
    result.incidents, result.detected = len(incidents), len(delays)
    if delays:
        result.median_delay = timedelta(seconds=statistics.median(d.total_seconds() for d in delays))
        result.worst_delay = max(delays)
    return result


def _kind(alert: dict[str, Any], labels: list[Label]) -> str:
    """The same verdict the demo's summary gives an alert."""
    label = match_label(alert, labels)
    if label is not None:
        return "matched" if label.kind == "incident" else "decoy"
    return "related" if overlapping(alert, labels) else "unlabelled"


# ── the replay ───────────────────────────────────────────────────────────────────────────────────


@dataclass
class Row:
    check: str | None  # None: every backtested check together
    setting: Setting
    score: Score


@dataclass
class Backtest:
    start: datetime
    end: datetime
    checks: list[str]
    settings: list[Setting]
    labels: list[Label] | None
    rows: list[Row]
    kept: Path | None = None

    @property
    def days(self) -> float:
        return (self.end - self.start) / _DAY

    def name(self, setting: Setting) -> str:
        """How the table names a setting: itself when short, else ``#n`` explained below it."""
        number = self.settings.index(setting)
        return setting.label if len(setting.label) <= _SHORT else f"#{number}"


def backtest(project: Project, names: Sequence[str], start: datetime, end: datetime,
             settings: Sequence[Setting] = (), labels: list[Label] | None = None, keep: Path | None = None,
             progress: Progress | None = None) -> Backtest:
    """Replay the lake up to ``end`` once per setting (the baseline first) and score each check.

    Every setting is validated before anything runs. The scratch warehouses live in a temporary
    folder that is removed afterwards, or in ``keep`` (a new or empty folder) to be inspected; a
    backtest that fails leaves neither behind.
    """
    say = progress or (lambda _: None)
    if end <= start:
        raise BacktestError(f"--to ({end}) must be after --from ({start})")
    checks = select_checks(project, list(dict.fromkeys(names)))
    chosen = [Setting()]
    chosen += [s for s in settings if s.overrides and s.overrides not in [c.overrides for c in chosen]]
    variants = [_replay_project(project, apply_setting(project, checks, s), end) for s in chosen]
    folder = _scratch(keep)
    outcome = Backtest(start, end, [c.name for c in checks], chosen, labels, [], keep)
    finished = False
    try:
        for number, (setting, variant) in enumerate(zip(chosen, variants), start=1):
            scratch = replace(variant, warehouse=folder / _folder_name(number) / "warehouse.duckdb")
            prefix = f"setting {number}/{len(chosen)} {outcome.name(setting)}"
            run(scratch, [c.name for c in checks], progress=lambda message: say(f"{prefix}: {message}"))
            con = connect(scratch, read_only=True)
            try:
                alerts = alerts_from(con, checks=tuple(outcome.checks), since=start)
            finally:
                con.close()
            outcome.rows += [Row(c.name, setting, score(alerts, labels, {c.name}, start, end))
                             for c in checks]
            if len(checks) > 1:
                every = score(alerts, labels, set(outcome.checks), start, end)
                outcome.rows.append(Row(None, setting, every))
        if keep is not None:
            (folder / "backtest.json").write_text(backtest_json(outcome) + "\n", encoding="utf-8")
        finished = True
    finally:
        if keep is None:
            shutil.rmtree(folder, ignore_errors=True)
        elif not finished:  # the kept folder was new or empty: leave it so
            for item in folder.iterdir():
                if item.is_dir():
                    shutil.rmtree(item)
                else:
                    item.unlink()
    return outcome


def _replay_project(project: Project, checks: list[Check], end: datetime) -> Project:
    """The project with only these checks, every source read up to ``end`` (warehouse set later)."""
    sources = {name: replace(source, until=end) for name, source in project.sources.items()}
    bounded = {c.name: replace(c, source=sources[c.source.name]) for c in checks}
    return replace(project, sources=sources, checks=bounded)


def _scratch(keep: Path | None) -> Path:
    if keep is None:
        return Path(tempfile.mkdtemp(prefix="plimsoll-backtest-"))
    keep = Path(keep)
    if keep.exists() and (not keep.is_dir() or any(keep.iterdir())):
        raise BacktestError(f"--keep {keep}: must be a new or empty folder")
    keep.mkdir(parents=True, exist_ok=True)
    return keep


def _folder_name(number: int) -> str:
    return "baseline" if number == 1 else f"setting-{number - 1}"


# ── output ───────────────────────────────────────────────────────────────────────────────────────


def backtest_rows(outcome: Backtest) -> list[dict[str, Any]]:
    """One plain mapping per check and setting: what ``--json`` prints."""
    out = []
    for row in outcome.rows:
        s = row.score
        number = outcome.settings.index(row.setting)
        out.append({
            "check": row.check,
            "setting": row.setting.label,
            "setting_number": number,
            "overrides": [o.text for o in row.setting.overrides],
            "warehouse": (str(outcome.kept / _folder_name(number + 1) / "warehouse.duckdb")
                          if outcome.kept else None),
            "from": outcome.start.isoformat(sep=" "),
            "to": outcome.end.isoformat(sep=" "),
            "days": round(outcome.days, 6),
            "alerts": s.alerts,
            "alerts_per_day": round(s.per_day, 6),
            "matched": s.matched,
            "related": s.related,
            "decoys": s.decoys,
            "unlabelled": s.unlabelled,
            "incidents": s.incidents,
            "detected": s.detected,
            "precision": None if s.precision is None else round(s.precision, 6),
            "recall": None if s.recall is None else round(s.recall, 6),
            "median_delay_seconds": None if s.median_delay is None else s.median_delay.total_seconds(),
            "worst_delay_seconds": None if s.worst_delay is None else s.worst_delay.total_seconds(),
            "missed": [{"check": m.check, "key": m.key, "start": m.start.isoformat(sep=" ")}
                       for m in s.missed],
        })
    return out


def backtest_json(outcome: Backtest) -> str:
    return json.dumps(backtest_rows(outcome), indent=2, ensure_ascii=False)


def backtest_table(outcome: Backtest) -> str:
    """A fixed-width table, one row per check and setting, then the incidents each setting missed."""
    labelled = outcome.labels is not None
    head = ["check", "setting", "alerts", "per day"]
    if labelled:
        head += ["matched", "related", "decoys", "precision", "recall", "median delay", "worst delay"]
    body = []
    for row in outcome.rows:
        s = row.score
        cells = [row.check or "(all)", outcome.name(row.setting), str(s.alerts), f"{s.per_day:.2f}"]
        if labelled:
            cells += [str(s.matched), str(s.related), str(s.decoys), _fraction(s.precision),
                      f"{_fraction(s.recall)} ({s.detected}/{s.incidents})", _duration(s.median_delay),
                      _duration(s.worst_delay)]
        body.append(cells)
    numeric = {i for i, name in enumerate(head) if name not in ("check", "setting")}
    widths = [max(len(r[i]) for r in (head, *body)) for i in range(len(head))]

    def line(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if i in numeric else c.ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    lines = [
        f"Backtest of {', '.join(outcome.checks)}",
        f"alerts opened from {outcome.start:%Y-%m-%d %H:%M} to {outcome.end:%Y-%m-%d %H:%M} "
        f"({outcome.days:g} days of data time); earlier data warms up the baselines",
        "",
        line(head),
        "  ".join("-" * w for w in widths),
        *(line(cells) for cells in body),
    ]
    spelt = [f"  {outcome.name(s)}: {s.label}" for s in outcome.settings if outcome.name(s) != s.label]
    if spelt:
        lines += ["", "Settings:", *spelt]
    if labelled:
        missed = [(row, m) for row in outcome.rows if row.check is not None for m in row.score.missed]
        lines += ["", "precision: alerts matching an incident label of their check / alerts opened in range",
                  "recall: labelled incidents of the check starting in range that an alert found",
                  "delay: from an incident's start to the opening of its first matching alert, in data time"]
        lines += [f"missed with {outcome.name(row.setting)}: {m.check} {m.key} "
                  f"(from {m.start:%Y-%m-%d %H:%M})"
                  for row, m in missed]
    if outcome.kept:
        lines += ["", f"Scratch warehouses kept in {outcome.kept}/ (one folder per setting, backtest.json)"]
    return "\n".join(lines)


def _fraction(value: float | None) -> str:
    return "-" if value is None else f"{value:.2f}"


def _duration(value: timedelta | None) -> str:
    """``45m``, ``2h 05m``, ``1d 03h``: data-time delays as one reads them."""
    if value is None:
        return "-"
    minutes = int(value.total_seconds() // 60)
    days, rest = divmod(minutes, 24 * 60)
    hours, minutes = divmod(rest, 60)
    if days:
        return f"{days}d {hours:02d}h"
    return f"{hours}h {minutes:02d}m" if hours else f"{minutes}m"
