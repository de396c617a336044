"""Backtests: replay the lake into a scratch warehouse and score checks, under several settings.

A backtest runs the normal runner, on a copy of the project whose warehouse is a fresh file in a
scratch folder and whose sources stop at ``--to``, so it executes exactly the SQL a run would and
never opens the live warehouse. Each setting (the checks as their files say, then each set of
overrides) gets its own scratch warehouse. Data before ``--from`` only warms up the baselines;
alerts are scored when they open in ``[from, to)``.
"""

from __future__ import annotations

import json
import shutil
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

from toolkit.backtest.labels import Label
from toolkit.backtest.scoring import Score, score
from toolkit.backtest.settings import BacktestError, Setting, apply_setting
from toolkit.engine.runner import run, select_checks
from toolkit.engine.warehouse import connect
from toolkit.model import Check, Project
from toolkit.outputs.listings import alerts_from

Progress = Callable[[str], None]


_DAY = timedelta(days=1)
_SHORT = 32  # a setting's label longer than this is shown as #n in the table, spelt out below it


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
            scratch = replace(variant, warehouse=folder / folder_name(number) / "warehouse.duckdb")
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


def folder_name(number: int) -> str:
    return "baseline" if number == 1 else f"setting-{number - 1}"


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
            "warehouse": (str(outcome.kept / folder_name(number + 1) / "warehouse.duckdb")
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
