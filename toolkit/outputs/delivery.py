"""Webhook delivery through an outbox table: alert events queued in the warehouse, POSTed, recorded.

``plimsoll notify`` first queues, in one transaction, every alert event not yet in the ``outbox`` table
once per webhook and incident (``queries/outbox.sql`` decides which events are worth sending). It then
delivers: one worker thread per webhook POSTs that webhook's due rows in order, each with its
``Idempotency-Key``, while the calling thread alone writes the warehouse, committing the outcome of
every POST at once. So a success is never sent again, a failure is retried with exponential backoff
up to ``max_attempts``, and a crash between a POST's success and its commit resends the same bytes with
the same key (delivery is at least once). A webhook's ``timeout`` bounds a whole request (connect,
send, status, headers, body), and one endpoint's trouble never delays another's deliveries. The
warehouse is held only while queuing and recording, never during a POST, so a slow or dead endpoint
never keeps ``plimsoll run`` out; ``plimsoll run`` itself never touches the network. Times in the
outbox are wall clock (UTC): delivery happens in real time, not data time.
"""

from __future__ import annotations

import fcntl
import http.client
import json
import os
import queue
import socket
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import duckdb

from toolkit import __version__

from toolkit.engine import warehouse
from toolkit.sql.templates import template_folder
from toolkit.config.bodies import BodyError, compile_body, is_text_type, render_body, variables
from toolkit.model import Mailbox, Project, Webhook, endpoint
from toolkit.outputs import mail
from toolkit.outputs.deadline import Deadline as _Deadline
from toolkit.outputs.listings import printable
from toolkit.words import Reading, plural, readable_number, readings
from toolkit.problems import PlimsollError, RunLocked


RECORD_WAIT = 30.0  # seconds to wait for a run to release the warehouse before giving up on recording a POST


class Clock:
    """Wall-clock time in naive UTC, and sleeping; tests pass one that only pretends."""

    def now(self) -> datetime:
        return datetime.now(timezone.utc).replace(tzinfo=None)

    def sleep(self, seconds: float, stop: threading.Event | None = None) -> None:
        """Wait ``seconds``, or less once ``stop`` is set."""
        if stop is None:
            time.sleep(seconds)
        else:
            stop.wait(seconds)


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
    key: str = ""                  # the row's idempotency key
    at: datetime | None = None     # when the POST ended (wall clock, UTC)
    incident_id: str | None = None  # an incident's event (webhooks with per: incident)
    merged_into: str | None = None  # a close of an incident whose alerts joined this one


@dataclass
class NotifyResult:
    queued: int = 0                 # rows queued to be sent in this call
    skipped: int = 0                # events recorded as skipped, not to be sent (why: skipped_for)
    skipped_for: dict[str, int] = field(default_factory=dict)  # skip_reason -> rows skipped in this call
    retried_abandoned: int = 0
    orphaned: int = 0               # queued rows of webhooks no longer configured, abandoned now
    unsent: list[str] = field(default_factory=list)  # webhooks given nothing: a header's variable is not set
    unrendered: list[str] = field(default_factory=list)  # rows abandoned as queued: their body template failed
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
        return self.orphaned + len(self.unrendered) + sum(a.status == "abandoned" for a in self.attempts)

    @property
    def exit_code(self) -> int:
        """0 when nothing is left failing; 1 when a row still waits for a retry or was given up now, or a
        webhook's header could not be made."""
        return 1 if self.failing or self.abandoned_now or self.unsent else 0


def notify(project: Project, clock: Clock | None = None, retry_for: timedelta = timedelta(0),
           retry_abandoned: bool = False) -> NotifyResult:
    """Queue new alert events, then deliver due rows; keep retrying those due within ``retry_for``."""
    clock = clock or Clock()
    result = NotifyResult()
    if not Path(project.warehouse).exists() and destinations(project):  # no warehouse or lock file made for it
        raise PlimsollError(f"{project.warehouse}: no warehouse yet, so no events to send; run `plimsoll run` "
                            "first")
    if not Path(project.warehouse).exists():
        return result   # nowhere to send, nothing to send: describe() says so
    with _single_notifier(project):
        with _warehouse(project) as con:
            _queue(con, project, clock.now(), retry_abandoned, result)
            pending = _pending(con, [h.name for h in destinations(project)])
        headers: dict[str, dict[str, str]] = {}
        for hook in destinations(project):
            try:
                headers[hook.name] = _headers(hook) if isinstance(hook, Webhook) else mail.secrets(hook)
            except PlimsollError as err:
                result.unsent.append(str(err))
                pending.pop(hook.name, None)
        _deliver_all(project, pending, headers, clock, clock.now() + retry_for, result)
        with _warehouse(project) as con:
            _count(con, result)
    return result


def _queue(con: duckdb.DuckDBPyConnection, project: Project, now: datetime, retry_abandoned: bool,
           result: NotifyResult) -> None:
    """Step 1, one transaction: queue new events, give up rows of removed webhooks, requeue if asked."""
    names = [h.name for h in destinations(project)]
    con.execute("BEGIN TRANSACTION")
    try:
        _upgrade(con, project)
        if destinations(project):
            params = {"webhooks": [{"name": h.name, "url": h.endpoint, "catch_up": h.catch_up.total_seconds(),
                                    "per": h.per} for h in destinations(project)],
                      "growth": project.notify.growth, "now": now, "version": __version__}
            for statement in con.extract_statements((template_folder() / "outbox.sql").read_text(encoding="utf-8")):
                con.execute(statement.query, {k: params[k] for k in statement.named_parameters})
            result.queued, result.skipped = con.execute(
                "SELECT count(*) FILTER (WHERE status = 'queued'), count(*) FILTER (WHERE status = 'skipped') "
                "FROM outbox_new").fetchone()
            result.skipped_for = dict(con.execute(
                "SELECT skip_reason, count(*) FROM outbox_new WHERE status = 'skipped' GROUP BY skip_reason").fetchall())
            new_rows = con.execute("SELECT idempotency_key, webhook, status, payload FROM outbox_new "
                                   "ORDER BY seq").fetchall()
            result.unrendered = _dress(con, project, now, new_rows)
            result.queued -= len(result.unrendered)
        result.orphaned = con.execute(
            "UPDATE outbox SET status = 'abandoned', last_error = 'webhook no longer in the project file' "
            "WHERE status = 'queued' AND NOT list_contains($h, webhook)", {"h": names}).fetchone()[0]
        if retry_abandoned:
            result.retried_abandoned = con.execute(
                "UPDATE outbox SET status = 'queued', attempts = 0, next_attempt_at = $now "
                "WHERE status = 'abandoned' AND list_contains($h, webhook)", {"h": names, "now": now}).fetchone()[0]
            # a row abandoned because its template failed has no body: render it now, with the
            # template as it is now (a row that was sent keeps its bytes)
            rendered = [h.name for h in project.webhooks if h.body is not None]
            again = con.execute(
                "SELECT idempotency_key, webhook, status, payload FROM outbox WHERE status = 'queued' AND attempts = 0 "
                "AND body IS NULL AND starts_with(last_error, 'body template') AND list_contains($h, webhook) "
                "ORDER BY seq", {"h": rendered}).fetchall()
            failed = _dress(con, project, now, again)
            result.unrendered += failed
            result.retried_abandoned -= len(failed)
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        raise


def destinations(project: Project) -> tuple[Webhook | Mailbox, ...]:
    """Everything ``notify`` sends to: the webhooks, then the mail recipients. They share the outbox,
    its queuing rules and its retries; their names are unique among them all."""
    return (*project.webhooks, *project.mailboxes)


def _dress(con: duckdb.DuckDBPyConnection, project: Project, now: datetime,
           rows: list[tuple[str, str, str, str]]) -> list[str]:
    """The rows just queued (key, destination, status, payload), in the queue's transaction: each
    payload given its words (``summary``; a check's ``measure``, ``unit``, ``value_text`` and
    ``threshold_text``; values without binary noise), and the bytes each destination
    sends when not the payload (a webhook's template rendered, a mail message) fixed now, so every
    attempt sends the same. A template that fails for an event abandons that row now, with the error.
    Returns the lines saying which."""
    if not rows:
        return []
    known = readings(project)
    hooks = {h.name: h for h in destinations(project)}
    templates: dict[str, Any] = {}
    dressed, failed = [], []
    for key, name, status, text in rows:
        payload = json.loads(text)
        reading = _reading(payload, known)
        for field_name in ("value", "threshold"):
            if isinstance(payload.get(field_name), float):
                payload[field_name] = readable_number(payload[field_name])
        found = variables(payload, reading, project.report_url)
        if not payload.get("alarm") and "cause" not in payload:
            payload.update(measure=reading.kind, unit=reading.unit, value_text=found["value_text"],
                           threshold_text=found["threshold_text"])
        payload["summary"] = found["summary"]
        body, content_type, error = None, None, None
        hook = hooks.get(name)
        if status == "queued" and isinstance(hook, Mailbox):
            body, content_type = mail.message(hook, payload, found, key, now), "message/rfc822"
        elif status == "queued" and isinstance(hook, Webhook) and hook.body is not None:
            content_type = hook.content_type
            if is_text_type(content_type) and "charset" not in content_type.lower():
                content_type += "; charset=utf-8"   # the body is UTF-8: say so, or a receiver may guess Latin-1
            try:
                if name not in templates:
                    templates[name] = compile_body(hook.body, hook.content_type)
                body = render_body(templates[name], hook.content_type, variables(payload, reading, project.report_url))
            except BodyError as err:
                error = f"body template ({hook.body_origin}): {err}"
                what = f"incident {payload.get('incident_id')}" if "cause" in payload else f"alert {payload.get('alert_id')}"
                failed.append(f"{name}: {payload.get('event')} of {what}: {error}")
        dressed.append({"idempotency_key": key, "payload": json.dumps(payload, ensure_ascii=False, allow_nan=False, separators=(",", ":")),
                        "body": body, "content_type": content_type, "error": error})
    import pyarrow as pa

    table = pa.Table.from_pylist(dressed, schema=pa.schema([(n, pa.string()) for n in
                                                            ("idempotency_key", "payload", "body", "content_type",
                                                             "error")]))
    con.register("outbox_dressed", table)
    try:
        con.execute(
            """
            UPDATE outbox
            SET payload = d.payload, body = d.body, content_type = d.content_type,
                status = CASE WHEN d.error IS NULL THEN outbox.status ELSE 'abandoned' END,
                last_error = coalesce(d.error, outbox.last_error),
                next_attempt_at = CASE WHEN d.error IS NULL THEN outbox.next_attempt_at END
            FROM outbox_dressed AS d
            WHERE outbox.idempotency_key = d.idempotency_key
            """)
    finally:
        con.unregister("outbox_dressed")
    return failed


def _reading(payload: dict[str, Any], known: dict[str, Reading]) -> Reading:
    check = (payload.get("cause") or {}).get("check") if "cause" in payload else payload.get("check")
    return known.get(check or "", Reading())


def _upgrade(con: duckdb.DuckDBPyConnection, project: Project) -> None:
    """Rows queued by earlier versions: keep no URL beyond scheme://host:port, and move the rows of a
    webhook without a name, once kept under its full URL, to its name now (its scheme://host:port)."""
    configured = {h.name for h in project.webhooks}
    for hook in project.webhooks:
        if hook.name == hook.endpoint != hook.url and hook.url not in configured:
            con.execute("UPDATE outbox SET webhook = $name WHERE webhook = $url", {"name": hook.name, "url": hook.url})
    for (url,) in con.execute("SELECT DISTINCT url FROM outbox WHERE url IS NOT NULL").fetchall():
        if endpoint(url) != url:
            con.execute("UPDATE outbox SET url = $short, last_error = replace(last_error, $url, $short) WHERE url = $url",
                        {"url": url, "short": endpoint(url)})


def _headers(hook: Webhook) -> dict[str, str]:
    """The webhook's own headers, their values read from the environment now; never shown anywhere."""
    found = {}
    for header, variable in hook.headers:
        value = os.environ.get(variable)
        if not value:
            raise PlimsollError(f"{hook.name}: environment variable {variable} (header {header}) is not set; "
                                "nothing sent to this webhook")
        if any(c in value for c in "\r\n\0") or not _latin1(value):
            raise PlimsollError(f"{hook.name}: environment variable {variable} (header {header}) holds a line break "
                                "or a character a header cannot carry; nothing sent to this webhook")
        found[header] = value
    return found


def _latin1(text: str) -> bool:
    try:
        text.encode("latin-1")
    except UnicodeEncodeError:
        return False
    return True


@dataclass
class _Row:
    """A queued outbox row as its webhook's worker keeps it between attempts."""

    key: str
    payload: str
    attempts: int
    next_at: datetime
    event: str
    alert_id: str
    key_text: str
    incident_id: str | None = None
    merged_into: str | None = None
    body: str | None = None           # what is sent when not the payload: a rendered template, a mail message
    content_type: str | None = None


def _pending(con: duckdb.DuckDBPyConnection, names: list[str]) -> dict[str, list[_Row]]:
    """Every queued row of the configured webhooks, per webhook, in queue order."""
    rows = con.execute(
        """
        SELECT o.webhook, o.idempotency_key, o.payload, o.attempts, o.next_attempt_at, o.event, o.alert_id,
               coalesce(a.key_text, ''), o.incident_id,
               CASE WHEN o.incident_id IS NOT NULL THEN o.payload::JSON ->> 'merged_into' END, o.body, o.content_type
        FROM outbox AS o
        LEFT JOIN alerts AS a ON a.alert_id = o.alert_id
        WHERE o.status = 'queued' AND list_contains($h, o.webhook)
        ORDER BY o.seq
        """,
        {"h": names},
    ).fetchall()
    pending: dict[str, list[_Row]] = {}
    for webhook, *fields in rows:
        pending.setdefault(webhook, []).append(_Row(*fields))
    return pending


def _deliver_all(project: Project, pending: dict[str, list[_Row]], headers: dict[str, dict[str, str]],
                 clock: Clock, until: datetime, result: NotifyResult) -> None:
    """Step 2: one worker per webhook POSTs its rows; this thread alone records every outcome.

    Each webhook is served independently, so an endpoint that hangs, trickles or fails delays none of
    the others. DuckDB is only touched here, one committed statement per POST, in the order the POSTs
    end; a worker waits for its outcome to be recorded before its next POST, so at most one success
    per webhook can be unrecorded when the process dies.
    """
    outcomes: queue.Queue = queue.Queue()
    stop = threading.Event()
    workers = [threading.Thread(target=_worker, name=f"notify {hook.name}", daemon=True,
                                args=(project, hook, headers[hook.name], pending[hook.name], clock, until,
                                      outcomes, stop))
               for hook in destinations(project) if pending.get(hook.name)]
    for worker in workers:
        worker.start()
    try:
        _collect(project, outcomes, len(workers), stop, result)
    except BaseException:
        stop.set()  # e.g. interrupted while waiting: the workers start no further POST
        raise
    for worker in workers:
        worker.join()


def _collect(project: Project, outcomes: queue.Queue, running: int, stop: threading.Event,
             result: NotifyResult) -> None:
    """Record each outcome as it comes, until every worker is done; then raise the first failure."""
    failure = None
    while running:
        item = outcomes.get()
        if item is None:
            running -= 1
            continue
        if isinstance(item, BaseException):
            failure = failure or item
            stop.set()
            continue
        attempt, recorded = item
        try:
            if failure is None:  # after a failure, outcomes are left unrecorded: sent again next time
                _record(project, attempt)
                result.attempts.append(attempt)
        except BaseException as err:
            failure = err
            stop.set()
        finally:
            recorded.set()
    if failure is not None:
        raise failure


def _worker(project: Project, hook: Webhook | Mailbox, headers: dict[str, str], rows: list[_Row], clock: Clock,
            until: datetime, outcomes: queue.Queue, stop: threading.Event) -> None:
    """One webhook's deliveries: its due rows in order, resting after a failure, until nothing is due."""
    try:
        resting: datetime | None = None  # after a failure the endpoint is left alone until that row is due
        while rows and not stop.is_set():
            now = clock.now()
            if resting is None or resting <= now:
                resting = None
                for row in [r for r in rows if r.next_at <= now]:
                    attempt = _attempt(project, hook, headers, row, clock)
                    recorded = threading.Event()
                    outcomes.put((attempt, recorded))
                    recorded.wait()
                    if stop.is_set():
                        return
                    if attempt.next_attempt_at is None:
                        rows.remove(row)
                    else:  # failed, to be retried: the endpoint's other rows wait with it
                        row.attempts, row.next_at = attempt.attempts, attempt.next_attempt_at
                        resting = attempt.next_attempt_at
                        break
            if not rows:
                return
            upcoming = max(min(r.next_at for r in rows), resting or datetime.min)
            if upcoming > until:
                return
            clock.sleep(max(0.0, (upcoming - clock.now()).total_seconds()), stop)
    except BaseException as err:  # handed to the recording thread, which raises it
        outcomes.put(err)
    finally:
        outcomes.put(None)


def _attempt(project: Project, hook: Webhook | Mailbox, headers: dict[str, str], row: _Row, clock: Clock) -> Attempt:
    """Send one row (POST it, or mail it) and decide what becomes of it: delivered, retried later, or
    abandoned."""
    if isinstance(hook, Mailbox):
        ok, retry, error = mail.send(hook, row.body or "", headers.get("password"))
        retry_after = None
    else:
        ok, retry, error, retry_after = post(hook, (row.body if row.body is not None else row.payload).encode("utf-8"),
                                             row.key, headers, row.content_type or "application/json")
    now = clock.now()
    attempts = row.attempts + 1
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
    return Attempt(hook.name, row.event, row.alert_id, row.key_text, ok, status, attempts, error, next_at,
                   row.key, now, row.incident_id, row.merged_into)


def _record(project: Project, attempt: Attempt) -> None:
    """One committed statement per POST, so a recorded success is never sent again."""
    url = next((h.endpoint for h in destinations(project) if h.name == attempt.webhook), None)
    try:
        with _warehouse(project, wait=RECORD_WAIT) as con:
            con.execute(
                """
                UPDATE outbox
                SET status = $status, attempts = $attempts, last_error = $error, last_attempt_at = $now,
                    next_attempt_at = $next, delivered_at = CASE WHEN $status = 'delivered' THEN $now END,
                    url = coalesce($url, url)
                WHERE idempotency_key = $key AND status = 'queued'
                """,
                {"status": attempt.status, "attempts": attempt.attempts, "error": attempt.error, "now": attempt.at,
                 "next": attempt.next_attempt_at, "key": attempt.key, "url": url},
            )
    except RunLocked as err:
        outcome = "was delivered" if attempt.ok else "failed"
        what = f"incident {attempt.incident_id}" if attempt.incident_id is not None else f"alert {attempt.alert_id}"
        raise RunLocked(f"{attempt.webhook}: {attempt.event} of {what} {outcome} but could not "
                        f"be recorded: {err}; the next `plimsoll notify` sends it again with the same "
                        "Idempotency-Key") from None


class _NoRedirects(urllib.request.HTTPRedirectHandler):
    """A redirected POST would arrive as a GET without its body; report it instead of following it."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):  # type: ignore[no-untyped-def]
        return None


def _deadline_connection(base: type[http.client.HTTPConnection], deadline: _Deadline) -> type:
    """``base`` whose sockets (to the endpoint or a proxy, before and after TLS) obey ``deadline``."""

    class Connection(base):  # type: ignore[misc, valid-type]
        def __init__(self, *args: object, **kwargs: object) -> None:
            super().__init__(*args, **kwargs)
            create = self._create_connection

            def create_watched(address, timeout=None, source_address=None):  # type: ignore[no-untyped-def]
                sock = create(address, deadline.remaining(), source_address)
                deadline.watch(sock)
                return sock

            self._create_connection = create_watched

        def connect(self) -> None:
            super().connect()
            deadline.watch(self.sock)

    return Connection


class _DeadlineHTTP(urllib.request.HTTPHandler):
    def __init__(self, deadline: _Deadline) -> None:
        super().__init__()
        self.deadline = deadline

    def http_open(self, req):  # type: ignore[no-untyped-def]
        return self.do_open(_deadline_connection(http.client.HTTPConnection, self.deadline), req)


class _DeadlineHTTPS(urllib.request.HTTPSHandler):
    def __init__(self, deadline: _Deadline) -> None:
        super().__init__()
        self.deadline = deadline

    def https_open(self, req):  # type: ignore[no-untyped-def]
        return self.do_open(_deadline_connection(http.client.HTTPSConnection, self.deadline), req,
                            context=self._context)


class _Late(Exception):
    """The request's deadline passed."""


def post(hook: Webhook, body: bytes, key: str, headers: dict[str, str] | None = None,
         content_type: str = "application/json") -> tuple[bool, bool, str | None, timedelta | None]:
    """POST ``body`` within the webhook's timeout: (delivered, worth retrying, error, the server's Retry-After).

    The error names the endpoint as scheme://host:port only, and never holds the URL's path or query
    or a header's value, since those often carry a secret.
    """
    ok, retry, error, retry_after = _post(hook, body, key, headers or {}, content_type)
    return ok, retry, (_hidden(error, hook, headers or {}) if error is not None else None), retry_after


def _post(hook: Webhook, body: bytes, key: str, headers: dict[str, str], content_type: str = "application/json"
          ) -> tuple[bool, bool, str | None, timedelta | None]:
    request = urllib.request.Request(hook.url, data=body, method="POST", headers={
        **headers, "Content-Type": content_type, "Idempotency-Key": key, "User-Agent": f"plimsoll/{__version__}",
    })
    seconds = hook.timeout.total_seconds()
    deadline = _Deadline(seconds)
    opener = urllib.request.build_opener(_NoRedirects(), _DeadlineHTTP(deadline), _DeadlineHTTPS(deadline))
    try:
        with deadline:
            try:
                with opener.open(request, timeout=seconds) as response:
                    response.read(1 << 16)
            except urllib.error.HTTPError as err:
                err.close()
                if deadline.expired:
                    raise _Late from None
                raise
            except Exception:
                if deadline.expired:
                    raise _Late from None
                raise
            if deadline.expired:  # the answer did not end in time: the body was cut off
                raise _Late
        return True, False, None, None
    except _Late:
        return False, True, f"no answer within {seconds:g} s", None
    except urllib.error.HTTPError as err:
        retry = err.code in (408, 425, 429) or err.code >= 500
        location = err.headers.get("Location")
        where = f" to {endpoint(location)} (not followed)" if 300 <= err.code < 400 and location else ""
        return False, retry, f"HTTP {err.code} {err.reason}{where}", _retry_after(err.headers.get("Retry-After"))
    except urllib.error.URLError as err:
        return False, True, f"cannot reach {hook.endpoint}: {_reason(err.reason)}", None
    except TimeoutError:
        return False, True, f"no answer within {seconds:g} s", None
    except (OSError, http.client.HTTPException, ValueError) as err:
        return False, True, f"connection failed: {_reason(err)}", None


def _hidden(text: str, hook: Webhook, headers: dict[str, str]) -> str:
    """``text`` without anything secret a library's message might have repeated: the URL beyond its
    endpoint, its path and query, and the header values."""
    parts = urllib.parse.urlsplit(hook.url)
    secrets = [hook.url, parts.netloc if "@" in parts.netloc else "", parts.path, parts.query, parts.fragment,
               *headers.values()]
    # what the endpoint's own text shows is no secret, and pieces this short would garble the message
    for secret in sorted({s for s in secrets if len(s) >= 6 and s not in hook.endpoint}, key=len, reverse=True):
        text = text.replace(secret, "[hidden]")
    return text


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


_SKIPS = {  # skip_reason -> how the summary counts it
    "growth": ("update below notify.growth", "updates below notify.growth"),
    "rebuilt": ("'check changed' close of an incident the rebuilt check goes on with",
                "'check changed' closes of incidents the rebuilt check goes on with"),
    "catch_up": ("event older than catch_up", "events older than catch_up"),
}


def _skips(counts: dict[str, int]) -> list[str]:
    return [f"{n} {_SKIPS[why][n != 1]}" for why, n in sorted(counts.items(), key=lambda c: list(_SKIPS).index(c[0]))]


def describe(project: Project, result: NotifyResult) -> str:
    """What ``plimsoll notify`` prints: what was queued, each attempt, and what is left."""
    if not destinations(project) and not result.orphaned:
        return "notify: no webhooks or email in the project file; nothing to send"
    receivers = [plural(len(project.webhooks), "webhook")] if project.webhooks or not project.mailboxes else []
    receivers += [f"{plural(len(project.mailboxes), 'mail recipient list')}"] if project.mailboxes else []
    lines = [f"notify: queued {plural(result.queued, 'event')} for {' and '.join(receivers)}"
             + (f" ({', '.join(_skips(result.skipped_for))} skipped)" if result.skipped else "")]
    if result.retried_abandoned:
        lines.append(f"  {result.retried_abandoned} abandoned deliver{'y' if result.retried_abandoned == 1 else 'ies'} "
                     "queued again")
    if result.orphaned:
        lines.append(f"  abandoned {result.orphaned} deliver{'y' if result.orphaned == 1 else 'ies'} to webhooks no "
                     "longer in the project file")
    for line in result.unsent:
        lines.append(f"  not sent   {line}")
    for line in result.unrendered:
        lines.append(f"  abandoned  {line}")
    for a in result.attempts:
        what = f"{a.webhook}: {a.event} {printable(a.key_text) or '(all sessions)'} [{a.alert_id}]"
        if a.incident_id is not None:
            merged = f" (merged into {printable(a.merged_into)})" if a.merged_into else ""
            what = f"{a.webhook}: incident {a.event}{merged}, cause {printable(a.key_text) or '(all sessions)'} " \
                   f"[{printable(a.incident_id)}]"
        if a.ok:
            lines.append(f"  delivered  {what}" + (f" ({a.error})" if a.error else ""))
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
