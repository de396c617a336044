"""The demo: Fernhill Broadcasting's lake, the standard catalogue run over it, and what it found.

``plimsoll demo`` builds everything in a work folder it owns (marked by a ``.plimsoll-demo`` file),
so running it again rebuilds rather than mixing two lakes.
"""

from __future__ import annotations

import shutil
import sys
import time
from dataclasses import dataclass, field
from importlib.resources import files
from pathlib import Path
from typing import Any

from toolkit.backtest.labels import Label, match_label, overlapping
from toolkit.outputs.listings import alerts_from, cause_line, incidents_from
from toolkit.problems import PlimsollError
from toolkit.words import Reading, against_text, plural, readings
from toolkit.config.project import load_project
from toolkit.engine.runner import RunResult, run
from toolkit.engine.warehouse import connect
from toolkit.warehouse_demo.generate import build_lake

MARKER = ".plimsoll-demo"

PROJECT_YML = """\
# Fernhill Broadcasting: the demo project written by `plimsoll demo`.
warehouse: warehouse.duckdb
checks: checks/
sources:
  sessions:
    path: lake/sessions/
    session_id: session_id
    event_time: ended_at
    # crawlers start sessions too; some say so, others only show it in their user agent
    exclude: is_bot OR regexp_matches(user_agent, '(?i)(bot|crawler|spider)')
    # viewers retry: alerts count the distinct viewers hit, from a sketch (the ids are never kept)
    viewer_id: viewer_id
    # where `plimsoll explain` looks for the place a series' failures concentrate
    attributes: [site, cdn, country, device_family, player_version, title_id]
"""


@dataclass
class Match:
    alert: dict[str, Any]
    label: Label | None
    during: Label | None = None  # an incident whose span the alert's breaching windows overlap


@dataclass
class DemoOutcome:
    workdir: Path
    sessions: int
    seconds_lake: float
    seconds_run: float
    result: RunResult
    labels: list[Label]
    matches: list[Match] = field(default_factory=list)
    incidents: list[dict[str, Any]] = field(default_factory=list)
    readings: dict[str, Reading] = field(default_factory=dict)   # how each check's figures read

    @property
    def found(self) -> list[Label]:
        return [lab for lab in self.labels if lab.kind == "incident" and any(m.label is lab for m in self.matches)]

    @property
    def missed(self) -> list[Label]:
        return [lab for lab in self.labels if lab.kind == "incident" and lab not in self.found]

    @property
    def decoys_hit(self) -> list[Match]:
        return [m for m in self.matches if m.label is not None and m.label.kind == "decoy"]

    @property
    def unlabelled(self) -> list[Match]:
        return [m for m in self.matches if m.label is None and m.during is None]

    @property
    def related(self) -> list[Match]:
        return [m for m in self.matches if m.label is None and m.during is not None]


def catalogue_folder() -> Path:
    return Path(str(files("toolkit.checks")))


def prepare_workdir(workdir: Path) -> None:
    """Make ``workdir`` an empty demo folder; refuse to clear a folder the demo did not create."""
    workdir = Path(workdir)
    if workdir.exists() and any(workdir.iterdir()) and not (workdir / MARKER).exists():
        raise PlimsollError(f"{workdir}: folder is not empty and was not made by `plimsoll demo`; "
                            "choose another --workdir")
    if workdir.exists():
        shutil.rmtree(workdir)
    workdir.mkdir(parents=True)
    (workdir / MARKER).write_text("built by plimsoll demo; `plimsoll demo` may delete this folder\n")


def write_project(workdir: Path) -> Path:
    (workdir / "plimsoll.yml").write_text(PROJECT_YML, encoding="utf-8")
    target = workdir / "checks"
    target.mkdir(exist_ok=True)
    for item in sorted(catalogue_folder().iterdir()):
        if item.name.endswith(".yml"):
            shutil.copyfile(item, target / item.name)
    return workdir / "plimsoll.yml"


def build_and_run(workdir: Path, sessions: int = 2_000_000, seed: int = 7,
                  progress: Any = None) -> DemoOutcome:
    say = progress or (lambda _: None)
    workdir = Path(workdir)
    prepare_workdir(workdir)
    say(f"demo: generating {sessions:,} sessions")
    t0 = time.perf_counter()
    labels = build_lake(workdir, sessions=sessions, seed=seed)
    t1 = time.perf_counter()
    project = load_project(write_project(workdir))
    result = run(project, progress=say)
    t2 = time.perf_counter()
    outcome = DemoOutcome(workdir, sessions, t1 - t0, t2 - t1, result, labels, readings=readings(project))
    con = connect(project, read_only=True)
    try:
        outcome.matches = [Match(a, match_label(a, labels), overlapping(a, labels)) for a in alerts_from(con)]
        outcome.incidents = sorted(incidents_from(con), key=lambda i: (i["opened_at"], i["incident_id"]))
    finally:
        con.close()
    return outcome


def _incident_lines(o: DemoOutcome) -> list[str]:
    """Each incident: its cause, where the cause's excess lies (as `plimsoll incidents` says it),
    the alerts it explains, and the label its cause matches."""
    by_alert = {m.alert["alert_id"]: m for m in o.matches}
    lines = []
    for i in o.incidents:
        cause = by_alert.get(i["cause_alert_id"])
        verdict = ("the labelled problem" if cause and cause.label and cause.label.kind == "incident"
                   else "DECOY (should not alert)" if cause and cause.label
                   else f"during the labelled {cause.during.check} problem" if cause and cause.during
                   else "not labelled")
        viewers = "" if i["affected_viewers"] is None else f" ({plural(i['affected_viewers'], 'viewer')})"
        lines.append(f"  {i['opened_at']:%Y-%m-%d %H:%M}  {i['cause_check']} {i['cause_key_text']}: "
                     f"{plural(i['affected_sessions'] or 0, 'session')} affected{viewers}, "
                     f"{i['alerts']} alert{'s' if i['alerts'] != 1 else ''}, {i['status']} - {verdict}")
        where = cause_line(None, i["causes"])
        if where:
            lines.append(f"      where: {where.removeprefix('(all sessions): ')}")
        explained = [f"{by_alert[a].alert['check_name']} {by_alert[a].alert['key_text']}"
                     for a in i["alert_ids"] if a != i["cause_alert_id"] and a in by_alert]
        if explained:
            lines.append(f"      explains: {'; '.join(explained)}")
    return lines


def _cause_is_labelled(o: DemoOutcome, incident: dict[str, Any]) -> bool:
    return any(m.alert["alert_id"] == incident["cause_alert_id"] and m.label is not None
               and m.label.kind == "incident" for m in o.matches)


def _explain_hint(o: DemoOutcome) -> list[str]:
    """How to ask where a broad alert's failures lie: the first site alert during another incident."""
    broad = [m.alert for m in sorted(o.matches, key=lambda m: m.alert["opened_at"])
             if m.alert["check_name"] == "site_errors" and m.during is not None]
    if not broad:
        return []
    a = broad[0]
    return [
        f"Ask where an alert's failures lie in the attributes (here the {a['check_name']} {a['key_text']} alert):",
        f"  {_command('plimsoll')} explain {a['alert_id']} -p {o.workdir / 'plimsoll.yml'}",
    ]


def _command(name: str) -> str:
    """The command as this installation has it, so the hint works outside an activated venv."""
    here = Path(sys.executable).parent
    if name == "python":
        return sys.executable
    return str(here / name) if (here / name).exists() else name


def summary(outcome: DemoOutcome) -> str:
    """What a new user reads after `plimsoll demo`: each alert, and the score against the labels."""
    o = outcome
    incidents = [lab for lab in o.labels if lab.kind == "incident"]
    lines = [
        f"Fernhill Broadcasting demo in {o.workdir}/",
        f"  lake: {o.sessions:,} sessions generated in {o.seconds_lake:.1f} s; "
        f"run {o.result.run_id}: {plural(len(o.result.checks), 'check')} over {plural(o.result.files_read, 'file')} "
        f"in {o.seconds_run:.1f} s",
        "",
        f"{plural(len(o.incidents), 'incident')}, {plural(len(o.matches), 'alert')}: "
        "each incident is the alerts of one problem, its cause the alert whose key explains the others",
        *_incident_lines(o),
        "",
        f"Alerts ({len(o.matches)}):",
    ]
    width = max((len(m.alert["check_name"]) for m in o.matches), default=0)
    for m in sorted(o.matches, key=lambda m: (m.alert["opened_at"], m.alert["check_name"])):
        a = m.alert
        verdict = ("labelled incident" if m.label and m.label.kind == "incident"
                   else "DECOY (should not alert)" if m.label
                   else f"during the labelled {m.during.check} incident" if m.during else "not labelled")
        split = f" [{a['split_value']}]" if a["split_value"] else ""
        lines.append(
            f"  {a['opened_at']:%Y-%m-%d %H:%M}  {a['check_name']:<{width}}  {a['key_text']}{split}: "
            f"at worst {against_text(a['peak_value'], a['threshold'], o.readings.get(a['check_name'], Reading()))}; "
            f"{plural(a['affected_sessions'], 'session')} affected"
            f"{'' if a.get('affected_viewers') is None else ' (' + plural(a['affected_viewers'], 'viewer') + ')'}"
            f" over {a['breach_windows']} "
            f"window{'s' if a['breach_windows'] != 1 else ''}, "
            f"{a['status']}{' (' + a['close_reason'] + ')' if a['close_reason'] else ''} - {verdict}"
        )
    lines += [
        "",
        f"Labelled problems found: {len(o.found)} of {len(incidents)}; incidents whose cause is a labelled "
        f"problem's check and key: {sum(1 for i in o.incidents if _cause_is_labelled(o, i))}"
        + ("" if not o.missed else "; missed: " + "; ".join(f"{m.check} {m.key}" for m in o.missed)),
        f"Decoys alerted: {len(o.decoys_hit)}; other alerts during a labelled incident: {len(o.related)}; "
        f"alerts matching no label: {len(o.unlabelled)}",
        "",
        "List the incidents and the alerts, or query the warehouse straight away (any DuckDB client; the",
        f"file is {o.workdir / 'warehouse.duckdb'}):",
        f"  {_command('plimsoll')} incidents -p {o.workdir / 'plimsoll.yml'}",
        f"  {_command('plimsoll')} alerts -p {o.workdir / 'plimsoll.yml'}",
        f"  {_command('python')} -c \"import duckdb; print(duckdb.connect('"
        f"{o.workdir / 'warehouse.duckdb'}', read_only=True).sql('SELECT check_name, key_text, opened_at, "
        "affected_sessions FROM alerts ORDER BY opened_at'))\"",
        "",
        "See each alert as a picture (a static page; open it in any browser):",
        f"  {_command('plimsoll')} report -p {o.workdir / 'plimsoll.yml'} --out {o.workdir / 'report.html'}",
        *_explain_hint(o),
        "Replay a check with a changed threshold, scored against the labels:",
        f"  {_command('plimsoll')} backtest title_errors -p {o.workdir / 'plimsoll.yml'} "
        f"--from 2026-11-09 --to 2026-11-23 --labels {o.workdir / 'labels.csv'} "
        "--setting 'baseline.factor=3'",
    ]
    return "\n".join(lines)


