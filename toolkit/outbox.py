"""Webhook delivery through an outbox table: alert events queued in the warehouse, POSTed, recorded.

``plimsoll notify`` first queues, in one transaction, every alert event not yet in the ``outbox`` table
once per webhook (``queries/outbox.sql`` decides which 'updated' events are worth sending). It then
POSTs each due row with its ``Idempotency-Key`` and commits the outcome of every POST at once, so a
success is never sent again, a failure is retried with exponential backoff up to ``max_attempts``, and
a crash between a POST's success and its commit resends the same bytes with the same key (delivery is
at least once). The warehouse is held only while queuing and recording, never during a POST, so a
slow or dead endpoint never keeps ``plimsoll run`` out; ``plimsoll run`` itself never touches the
network. Times in the outbox are wall clock (UTC): delivery happens in real time, not data time.
"""

from __future__ import annotations

import fcntl
import http.client
import os
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path

import duckdb

from . import __version__, warehouse
from .compiler import template_folder
from .model import Project, Webhook
from .outputs import printable
from .problems import PlimsollError, RunLocked


RECORD_WAIT = 30.0  # seconds to wait for a run to release the warehouse before giving up on recording a POST


class Clock:
    """Wall-clock time in naive UTC, and sleeping; tests pass one that only pretends."""

    def now(self) -> datetime:
        return datetime.now(timezone.utc).replace(tzinfo=None)

    def sleep(self, seconds: float) -> None:
        time.sleep(seconds)


@dataclass
class Attempt:
    """One POST of one outbox row and what became of the row."""

    webhook: str
    event: str
    alert_id: str
    key_text: str
    ok: bool
    status: str            # the row's status after this attempt
    attempts: int
    error: str | None = None
    next_attempt_at: datetime | None = None


@dataclass
class NotifyResult:
    queued: int = 0                 # rows queued to be sent in this call
    skipped: int = 0                # 'updated' events below notify.growth, recorded as skipped
    retried_abandoned: int = 0
    orphaned: int = 0               # queued rows of webhooks no longer configured, abandoned now
    attempts: list[Attempt] = field(default_factory=list)
    waiting: int = 0                # still to be sent after this call
    failing: int = 0                # of those, rows that have failed at least once
    abandoned_total: int = 0

    @property
    def delivered(self) -> list[Attempt]:
        return [a for a in self.attempts if a.ok]

    @property
    def failed(self) -> list[Attempt]:
        return [a for a in self.attempts if not a.ok]

    @property
    def abandoned_now(self) -> int:
        return self.orphaned + sum(a.status == "abandoned" for a in self.attempts)

    @property
    def exit_code(self) -> int:
        """0 when nothing is left failing; 1 when a row still waits for a retry or was given up now."""
        return 1 if self.failing or self.abandoned_now else 0


def notify(project: Project, clock: Clock | None = None, retry_for: timedelta = timedelta(0),
           retry_abandoned: bool = False) -> NotifyResult:
    """Queue new alert events, then deliver due rows; keep retrying those due within ``retry_for``."""
    clock = clock or Clock()
    result = NotifyResult()
    with _single_notifier(project):
        with _warehouse(project) as con:
            _queue(con, project, clock.now(), retry_abandoned, result)
        hooks = {h.name: h for h in project.webhooks}
        deadline = clock.now() + retry_for
        # an endpoint that failed is left alone until its failed row is due again, so a dead
        # endpoint costs one attempt per pass, not one per queued event
        resting: dict[str, datetime] = {}
        while True:
            now = clock.now()
            ready = [name for name in hooks if resting.get(name, now) <= now]
            with _warehouse(project) as con:
                due = _due(con, ready, now)
            for row in due:
                if row[1] in resting and resting[row[1]] > now:
                    continue
                attempt = _deliver(project, hooks[row[1]], row, clock)
                result.attempts.append(attempt)
                if attempt.next_attempt_at is not None:  # failed, to be retried: let the endpoint rest
                    resting[row[1]] = attempt.next_attempt_at
            upcoming = _next_due(project, list(hooks), resting)
            if upcoming is None or upcoming > deadline:
                break
            clock.sleep(max(0.0, (upcoming - clock.now()).total_seconds()))
        with _warehouse(project) as con:
            _count(con, result)
    return result


def _queue(con: duckdb.DuckDBPyConnection, project: Project, now: datetime, retry_abandoned: bool,
           result: NotifyResult) -> None:
    """Step 1, one transaction: queue new events, give up rows of removed webhooks, requeue if asked."""
    names = [h.name for h in project.webhooks]
    con.execute("BEGIN TRANSACTION")
    try:
        if project.webhooks:
            params = {"webhooks": [{"name": h.name, "url": h.url} for h in project.webhooks],
                      "growth": project.notify.growth, "now": now, "version": __version__}
            for statement in con.extract_statements((template_folder() / "outbox.sql").read_text(encoding="utf-8")):
                con.execute(statement.query, {k: params[k] for k in statement.named_parameters})
            result.queued, result.skipped = con.execute(
                "SELECT count(*) FILTER (WHERE status = 'queued'), count(*) FILTER (WHERE status = 'skipped') "
                "FROM outbox_new").fetchone()
        result.orphaned = con.execute(
            "UPDATE outbox SET status = 'abandoned', last_error = 'webhook no longer in the project file' "
            "WHERE status = 'queued' AND NOT list_contains($h, webhook)", {"h": names}).fetchone()[0]
        if retry_abandoned:
            result.retried_abandoned = con.execute(
                "UPDATE outbox SET status = 'queued', attempts = 0, next_attempt_at = $now "
                "WHERE status = 'abandoned' AND list_contains($h, webhook)", {"h": names, "now": now}).fetchone()[0]
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        raise


def _due(con: duckdb.DuckDBPyConnection, names: list[str], now: datetime) -> list[tuple]:
    return con.execute(
        """
        SELECT o.idempotency_key, o.webhook, o.payload, o.attempts, o.event, o.alert_id,
               coalesce(a.key_text, '')
        FROM outbox AS o
        LEFT JOIN alerts AS a ON a.alert_id = o.alert_id
        WHERE o.status = 'queued' AND o.next_attempt_at <= $now AND list_contains($h, o.webhook)
        ORDER BY o.seq
        """,
        {"now": now, "h": names},
    ).fetchall()


def _next_due(project: Project, names: list[str], resting: dict[str, datetime]) -> datetime | None:
    """When the next queued row may be tried, given the endpoints resting after a failure."""
    with _warehouse(project) as con:
        rows = con.execute("SELECT webhook, min(next_attempt_at) FROM outbox WHERE status = 'queued' "
                           "AND list_contains($h, webhook) GROUP BY webhook", {"h": names}).fetchall()
    times = [max(first, resting.get(name, first)) for name, first in rows]
    return min(times, default=None)


def _deliver(project: Project, hook: Webhook, row: tuple, clock: Clock) -> Attempt:
    """POST one row, then record the outcome in its own committed statement straight away."""
    key, name, payload, attempts, event, alert_id, key_text = row
    ok, retry, error, retry_after = post(hook, payload.encode("utf-8"), key)
    now = clock.now()
    attempts += 1
    settings = project.notify
    if ok:
        status, next_at = "delivered", None
    elif not retry or attempts >= settings.max_attempts:
        status, next_at = "abandoned", None
    else:
        wait = min(settings.max_backoff, settings.backoff * 2 ** (attempts - 1))
        if retry_after is not None:
            wait = min(settings.max_backoff, max(wait, retry_after))
        status, next_at = "queued", now + wait
    try:
        _record(project, key, status, attempts, error, now, next_at, hook.url)
    except RunLocked as err:
        outcome = "was delivered" if ok else "failed"
        raise RunLocked(f"{name}: {event} of alert {alert_id} {outcome} but could not be recorded: {err}; "
                        "the next `plimsoll notify` sends it again with the same Idempotency-Key") from None
    return Attempt(name, event, alert_id, key_text, ok, status, attempts, error, next_at)


def _record(project: Project, key: str, status: str, attempts: int, error: str | None, now: datetime,
            next_at: datetime | None, url: str) -> None:
    """One committed statement per POST, so a recorded success is never sent again."""
    with _warehouse(project, wait=RECORD_WAIT) as con:
        con.execute(
            """
            UPDATE outbox
            SET status = $status, attempts = $attempts, last_error = $error, last_attempt_at = $now,
                next_attempt_at = $next, delivered_at = CASE WHEN $status = 'delivered' THEN $now END,
                url = $url
            WHERE idempotency_key = $key AND status = 'queued'
            """,
            {"status": status, "attempts": attempts, "error": error, "now": now, "next": next_at,
             "key": key, "url": url},
        )


class _NoRedirects(urllib.request.HTTPRedirectHandler):
    """A redirected POST would arrive as a GET without its body; report it instead of following it."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):  # type: ignore[no-untyped-def]
        return None


_OPENER = urllib.request.build_opener(_NoRedirects())


def post(hook: Webhook, body: bytes, key: str) -> tuple[bool, bool, str | None, timedelta | None]:
    """POST ``body``: (delivered, worth retrying, error, the server's Retry-After)."""
    request = urllib.request.Request(hook.url, data=body, method="POST", headers={
        "Content-Type": "application/json", "Idempotency-Key": key, "User-Agent": f"plimsoll/{__version__}",
    })
    try:
        with _OPENER.open(request, timeout=hook.timeout.total_seconds()) as response:
            response.read(1 << 16)
        return True, False, None, None
    except urllib.error.HTTPError as err:
        retry = err.code in (408, 425, 429) or err.code >= 500
        where = f" to {err.headers.get('Location')}" if 300 <= err.code < 400 else ""
        return False, retry, f"HTTP {err.code} {err.reason}{where}", _retry_after(err.headers.get("Retry-After"))
    except urllib.error.URLError as err:
        return False, True, f"cannot reach {hook.url}: {_reason(err.reason)}", None
    except TimeoutError:
        return False, True, f"no answer within {hook.timeout.total_seconds():g} s", None
    except (OSError, http.client.HTTPException) as err:
        return False, True, f"connection failed: {_reason(err)}", None


def _reason(err: object) -> str:
    if isinstance(err, TimeoutError):
        return "timed out"
    return str(err) or type(err).__name__


def _retry_after(value: str | None) -> timedelta | None:
    return timedelta(seconds=int(value)) if value and value.strip().isdigit() else None


def _count(con: duckdb.DuckDBPyConnection, result: NotifyResult) -> None:
    result.waiting, result.failing, result.abandoned_total = con.execute(
        "SELECT count(*) FILTER (WHERE status = 'queued'), count(*) FILTER (WHERE status = 'queued' AND attempts > 0), "
        "count(*) FILTER (WHERE status = 'abandoned') FROM outbox").fetchone()


@contextmanager
def _warehouse(project: Project, wait: float = 0.0) -> Iterator[duckdb.DuckDBPyConnection]:
    """A short write connection: notify never holds the warehouse while it waits on the network."""
    con = warehouse.connect(project, wait=wait)
    try:
        yield con
    finally:
        con.close()


@contextmanager
def _single_notifier(project: Project) -> Iterator[None]:
    """One ``plimsoll notify`` per warehouse at a time, so two never POST the same row at once."""
    path = Path(str(project.warehouse) + ".notify.lock")
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a+") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            handle.seek(0)
            holder = handle.read().strip() or "another process"
            raise PlimsollError(f"{path}: another `plimsoll notify` is delivering for this warehouse "
                                f"(PID {holder})") from None
        handle.seek(0)
        handle.truncate()
        handle.write(str(os.getpid()))
        handle.flush()
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def describe(project: Project, result: NotifyResult) -> str:
    """What ``plimsoll notify`` prints: what was queued, each attempt, and what is left."""
    if not project.webhooks and not result.orphaned:
        return "notify: no webhooks in the project file; nothing to send"
    lines = [f"notify: queued {result.queued} event{'s' if result.queued != 1 else ''} for "
             f"{len(project.webhooks)} webhook{'s' if len(project.webhooks) != 1 else ''}"
             + (f" ({result.skipped} updates below notify.growth skipped)" if result.skipped else "")]
    if result.retried_abandoned:
        lines.append(f"  {result.retried_abandoned} abandoned deliveries queued again")
    if result.orphaned:
        lines.append(f"  abandoned {result.orphaned} deliveries to webhooks no longer in the project file")
    for a in result.attempts:
        what = f"{a.webhook}: {a.event} {printable(a.key_text) or '(all sessions)'} [{a.alert_id}]"
        if a.ok:
            lines.append(f"  delivered  {what}")
        elif a.status == "abandoned":
            lines.append(f"  abandoned  {what}: {a.error} (attempt {a.attempts})")
        else:
            lines.append(f"  failed     {what}: {a.error}; attempt {a.attempts + 1} of "
                         f"{project.notify.max_attempts} at {a.next_attempt_at:%Y-%m-%d %H:%M:%S} UTC")
    lines.append(f"notify: {len(result.delivered)} delivered, {len(result.failed)} failed, "
                 f"{result.waiting} waiting, {result.abandoned_now} abandoned now"
                 + (f" ({result.abandoned_total} in all; --retry-abandoned sends them again)"
                    if result.abandoned_total else ""))
    return "\n".join(lines)
