"""The ``plimsoll`` command: a thin layer that parses options, calls the library, reports errors.

No SQL and no YAML logic lives here; every command's work is one call into the toolkit.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable
from datetime import datetime, timezone
from functools import wraps
from pathlib import Path
from typing import Any

import click

from toolkit import __version__
from toolkit.sql.plans import check_plan
from toolkit.outputs.listings import (alerts_json, alerts_table, incidents_json, incidents_table, list_alerts,
                                      list_incidents)
from toolkit.problems import PlimsollError, display_path
from toolkit.words import plural, readings
from toolkit.config.judging import judging_warnings
from toolkit.config.project import load_project
from toolkit.sql.script import with_after_checks
from toolkit.engine.explain import (after_checks_sql, explain_alert, explain_at, explanation_json, explanation_table,
                                    parse_key)
from toolkit.engine.runner import run as run_checks
from toolkit.engine.runner import RunResult, select_checks
from toolkit.warehouse_demo.generate import MAX_SESSIONS, MIN_SESSIONS

project_option = click.option(
    "-p", "--project", "project_file", default="plimsoll.yml", show_default=True,
    type=click.Path(path_type=Path), help="The project file, or a folder holding plimsoll.yml.",
)

DATA_TIME = click.DateTime(["%Y-%m-%d", "%Y-%m-%d %H:%M", "%Y-%m-%d %H:%M:%S", "%Y-%m-%dT%H:%M",
                            "%Y-%m-%dT%H:%M:%S"])


def reports_errors(fn: Callable[..., Any]) -> Callable[..., Any]:
    """Turn library errors into their message on stderr and the error's exit code."""

    @wraps(fn)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return fn(*args, **kwargs)
        except PlimsollError as err:
            for line in str(err).splitlines() or [type(err).__name__]:
                click.echo(line, err=True)
            sys.exit(err.exit_code)
        except FileNotFoundError as err:
            click.echo(str(err), err=True)
            sys.exit(1)

    return wrapper


class _Progress:
    """Progress on stderr: on a terminal one line rewritten in place per step, otherwise one
    timestamped line per step, which is what a scheduler's log should hold."""

    def __init__(self) -> None:
        self.live = sys.stderr.isatty()
        self.shown = False

    def __call__(self, message: str) -> None:
        if self.live:
            click.echo(f"\r\033[K{_fit(message)}", err=True, nl=False)
            self.shown = True
        else:
            stamp = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
            click.echo(f"{stamp} {message}", err=True)

    def __enter__(self) -> _Progress:
        return self

    def __exit__(self, *_: object) -> None:
        if self.shown:  # end the live line, so what follows starts on a line of its own
            click.echo("", err=True)


def _fit(message: str) -> str:
    """The message cut to the terminal's width: a wrapped line could not be rewritten in place."""
    try:
        width = os.get_terminal_size(sys.stderr.fileno()).columns
    except (OSError, ValueError):
        return message
    return message if width <= 1 or len(message) < width else message[: width - 2] + "…"


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="plimsoll")
def main() -> None:
    """Plimsoll: checks over a playback-session lake, compiled to DuckDB SQL."""


@main.command()
@project_option
@reports_errors
def validate(project_file: Path) -> None:
    """Check the project and its check files; print each problem.

    One line per problem, file:line: message; exit 2 if there is any.
    """
    project = load_project(project_file)
    for warning in judging_warnings(project):  # valid, but a check that judges nothing for a long time
        click.echo(str(warning))
    click.echo(f"{display_path(project.file)}: {plural(len(project.checks), 'check')}, "
               f"{plural(len(project.sources), 'source')}: ok")


@main.command("sql")
@click.argument("check")
@project_option
@reports_errors
def show_sql(check: str, project_file: Path) -> None:
    """Print the SQL a run executes for CHECK, stage by stage."""
    project = load_project(project_file)
    (chosen,) = select_checks(project, [check])
    click.echo(with_after_checks(check_plan(chosen).sql, after_checks_sql(chosen), chosen.source), nl=False)


@main.command()
@project_option
@click.option("--check", "checks", multiple=True, help="Run only this check (repeatable).")
@click.option("--rebuild", is_flag=True, help="Forget these checks' state and read the whole lake again.")
@click.option("--wait", default=0.0, show_default=True, type=click.FloatRange(min=0),
              help="Seconds to wait for another run to release the warehouse.")
@click.option("--json", "as_json", is_flag=True,
              help="Print every run's record and its checks' as one JSON document, also on failure.")
@reports_errors
def run(project_file: Path, checks: tuple[str, ...], rebuild: bool, wait: float, as_json: bool) -> None:
    """Run the checks over the lake files not read before.

    One run, or several in turn when the backlog exceeds max_read_per_run; exit 2 when a changed check
    was left out (run it with --rebuild).
    """
    if as_json:
        _run_json(project_file, checks, rebuild, wait)
    project = load_project(project_file)
    with _Progress() as progress:
        result = run_checks(project, list(checks), rebuild, progress, wait=wait)
    for change in result.changed_files:
        click.echo(f"warning: lake file changed after it was read; not read again: {change}", err=True)
    for warning in result.warnings:
        click.echo(f"warning: {warning}", err=True)
    closed = sum(c.alerts_closed for c in result.checks)
    click.echo(
        f"{_runs(result)}: {plural(result.files_read, 'new file')}, "
        f"{plural(sum(c.windows_written for c in result.checks), 'window')}, "
        f"{plural(result.alerts_opened, 'alert')} opened, {closed} closed"
        + (f"; WARNING: {len(result.warnings)} (see above)" if result.warnings else "")
        + (f"; {plural(len(result.skipped), 'changed check')} not run" if result.skipped else "")
    )
    for alarm in result.alarms:  # the sources' silent and lagging alerts (wall clock)
        click.echo(alarm.line)
    for problem in result.skipped:
        click.echo(str(problem), err=True)
    if result.skipped:
        sys.exit(2)


@main.command()
@click.argument("target")
@click.option("--at", type=DATA_TIME, default=None,
              help="TARGET is a check: explain its window holding this data time (else TARGET is an alert id).")
@click.option("--key", "key_text", default="", help="With --at: the series, as COL=VALUE,... for every 'by' column.")
@click.option("--by", "by_text", default="", help="The attributes to drill into, COL,... (default: the check's or source's).")
@click.option("--json", "as_json", is_flag=True, help="JSON for scripts.")
@project_option
@reports_errors
def explain(target: str, at: datetime | None, key_text: str, by_text: str, as_json: bool, project_file: Path) -> None:
    """Rank where a window's bad sessions exceed what was expected.

    TARGET is an alert id (its opening window), or with --at a check name.
    """
    project = load_project(project_file)
    by = tuple(c.strip() for c in by_text.split(",") if c.strip())
    if at is None:
        if key_text:
            raise click.UsageError("--key goes with --at CHECK")
        found = explain_alert(project, target, by)
    else:
        found = explain_at(project, target, at, parse_key(key_text), by)
    click.echo(explanation_json(found) if as_json else explanation_table(found), nl=False)


@main.command()
@project_option
@click.option("--status", type=click.Choice(["open", "closed", "all"]), default="all", show_default=True,
              help="Only open or only closed alerts.")
@click.option("--check", "checks", multiple=True, help="Only alerts of this check (repeatable).")
@click.option("--since", type=DATA_TIME, default=None, metavar="TIME",
              help="Only alerts opened at or after this data time (UTC, YYYY-MM-DD[ HH:MM[:SS]]).")
@click.option("--json", "as_json", is_flag=True, help="JSON for scripts.")
@reports_errors
def alerts(project_file: Path, status: str, checks: tuple[str, ...], since: datetime | None, as_json: bool) -> None:
    """List alerts, open ones first."""
    project = load_project(project_file, check_schema=False)
    found = list_alerts(project, status, checks, since)
    click.echo(alerts_json(found) if as_json else alerts_table(found, readings(project)))


@main.command()
@project_option
@click.option("--status", type=click.Choice(["open", "closed", "all"]), default="all", show_default=True,
              help="Only open or only closed incidents.")
@click.option("--json", "as_json", is_flag=True, help="JSON for scripts.")
@reports_errors
def incidents(project_file: Path, status: str, as_json: bool) -> None:
    """List incidents, newest first.

    An incident is the alerts of one problem under the alert that explains them: its cause. Each
    shows its cause (check and key), its alerts, and where the cause's excess lies.
    """
    project = load_project(project_file, check_schema=False)
    found = list_incidents(project, status)
    click.echo(incidents_json(found) if as_json else incidents_table(found, readings(project)))


@main.command()
@project_option
@click.option("--out", "out", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="The HTML file to write.")
@click.option("--check", "checks", multiple=True, help="Only alerts of this check (repeatable).")
@click.option("--since", type=DATA_TIME, default=None, metavar="TIME",
              help="Only alerts opened at or after this data time (UTC, YYYY-MM-DD[ HH:MM[:SS]]).")
@reports_errors
def report(project_file: Path, out: Path, checks: tuple[str, ...], since: datetime | None) -> None:
    """Write one static HTML page of incidents, alerts and their series.

    Incidents first (cause, where its excess lies, its alerts), then open alerts; each alert's windows
    charted against its threshold.
    """
    from toolkit.outputs.report import write_report

    project = load_project(project_file, check_schema=False)
    done = write_report(project, out, checks, since)
    click.echo(f"{done.path}: {plural(done.alerts, 'alert')} ({done.open_alerts} open), "
               f"{plural(done.incidents, 'incident')}, "
               f"{done.bytes / 1024:,.0f} KiB")


@main.command()
@project_option
@click.option("--retry-for", "retry_text", default="0s", show_default=True, metavar="DURATION",
              help="Keep retrying failed deliveries that come due within this long, e.g. 5m.")
@click.option("--retry-abandoned", is_flag=True, help="Queue abandoned deliveries again, from attempt 1.")
@reports_errors
def notify(project_file: Path, retry_text: str, retry_abandoned: bool) -> None:
    """Send new alert and incident events to webhooks and by mail.

    Alert events by default; a webhook or mail list with per: incident gets its incidents' events.

    Exit 1 while a delivery fails or waits for a retry.
    """
    from toolkit.outputs.delivery import describe, notify as deliver
    from toolkit.config.fields import parse_duration

    try:
        retry_for = parse_duration(retry_text)
    except ValueError as err:
        raise click.BadParameter(str(err), param_hint="--retry-for") from None
    project = load_project(project_file, check_schema=False)
    result = deliver(project, retry_for=retry_for, retry_abandoned=retry_abandoned)
    click.echo(describe(project, result))
    sys.exit(result.exit_code)


@main.command()
@click.option("--workdir", default="plimsoll-demo", show_default=True,
              type=click.Path(file_okay=False, path_type=Path), help="Where to build the demo.")
@click.option("--sessions", default=2_000_000, show_default=True,
              type=click.IntRange(min=MIN_SESSIONS, max=MAX_SESSIONS), help="How many sessions the lake holds.")
@click.option("--seed", default=7, show_default=True, type=click.IntRange(min=0, max=2**63 - 1),
              help="Another seed, another lake.")
@reports_errors
def demo(workdir: Path, sessions: int, seed: int) -> None:
    """Build the Fernhill demo lake and run the catalogue over it.

    Prints each alert and whether it matches an incident the demo planted.
    """
    from toolkit.demo.run import build_and_run, summary

    with _Progress() as progress:
        outcome = build_and_run(workdir, sessions, seed, progress)
    click.echo(summary(outcome))


@main.command()
@click.argument("checks", nargs=-1, required=True)
@project_option
@click.option("--from", "start", required=True, type=DATA_TIME, metavar="TIME",
              help="Score alerts opening at or after this data time (UTC, YYYY-MM-DD[ HH:MM[:SS]]); "
                   "earlier data warms up the baselines.")
@click.option("--to", "end", required=True, type=DATA_TIME, metavar="TIME",
              help="Replay the lake up to this data time; later sessions are not read.")
@click.option("--labels", "labels_file", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              help="A labels file (see README): adds precision, recall and detection delay.")
@click.option("--set", "assignments", multiple=True, metavar="[CHECK:]KEY=VALUE",
              help="Override a check key, e.g. baseline.factor=3; every --set together is one setting.")
@click.option("--setting", "settings", multiple=True, metavar="'KEY=VALUE, ...'",
              help="One more setting to compare: overrides separated by commas (repeatable).")
@click.option("--keep", type=click.Path(file_okay=False, path_type=Path),
              help="Keep the scratch warehouses in this new or empty folder.")
@click.option("--json", "as_json", is_flag=True, help="JSON for scripts.")
@reports_errors
def backtest(checks: tuple[str, ...], project_file: Path, start: datetime, end: datetime,
             labels_file: Path | None, assignments: tuple[str, ...], settings: tuple[str, ...],
             keep: Path | None, as_json: bool) -> None:
    """Replay the lake to see what CHECK... would have done.

    The check files as they are and each setting side by side, each in a scratch warehouse.
    """
    from toolkit.backtest.replay import backtest as replay
    from toolkit.backtest.replay import backtest_json
    from toolkit.backtest.settings import settings_from
    from toolkit.backtest.table import backtest_table
    from toolkit.backtest.labels import read_labels

    compared = settings_from(assignments, settings)
    project = load_project(project_file)
    labels = read_labels(labels_file) if labels_file else None
    with _Progress() as progress:
        outcome = replay(project, list(checks), start, end, compared, labels, keep, progress)
    click.echo(backtest_json(outcome) if as_json else backtest_table(outcome))


def _run_json(project_file: Path, checks: tuple[str, ...], rebuild: bool, wait: float) -> None:
    """`run --json`: the records on stdout, whatever happened; progress, warnings and the error line
    on stderr as without it; the same exit codes."""
    from toolkit.outputs.runs import records_json, run_with_records

    with _Progress() as progress:
        records = run_with_records(project_file, list(checks), rebuild, progress, wait)
    for line in records.lines():
        click.echo(line, err=True)
    click.echo(records_json(records))
    sys.exit(records.exit_code)


def _runs(result: RunResult) -> str:
    """'run 7', or 'runs 3-7' when a backlog was read by several runs."""
    if result.first_run_id is None:
        return f"run {result.run_id}"
    return f"runs {result.first_run_id}-{result.run_id}"


if __name__ == "__main__":  # pragma: no cover
    main()

