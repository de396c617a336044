"""`plimsoll notify` against a real HTTP server on 127.0.0.1 that fails, resets and hangs on cue.

The warehouse comes from running the known lake's check over real Parquet; the server is
http.server in a thread on an ephemeral port; retries run on a pretend clock (no sleeping), while
every POST, timeout and connection reset is real.
"""

from __future__ import annotations

import hashlib
import json
import socket
import struct
import subprocess
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import duckdb
import pytest
from click.testing import CliRunner

from conftest import plimsoll_command, write_rows, warehouse_query
from known_lake import CHECK, HOSTILE, SCHEMA, START, known_project, session_rows, warehouse_held
from oracle import key_value
from toolkit.cli import main
from toolkit.model import Webhook
from toolkit.outputs.delivery import Clock, _hidden, _single_notifier, describe, notify
from toolkit.problems import PlimsollError
from toolkit.config.project import load_project
from toolkit.engine.runner import run

PAYLOAD_KEYS = {"idempotency_key", "event", "occurred_at", "check", "severity", "alert_id", "fingerprint", "key",
                "key_text", "split_value", "opened_at", "closed_at", "close_reason", "value", "threshold",
                "affected_sessions", "affected_viewers", "excess_sessions", "breach_windows", "incident_id", "causes",
                "run_id", "sender", "measure", "unit", "value_text", "threshold_text", "summary"}


@dataclass
class Received:
    behaviour: str
    key: str | None
    headers: dict[str, str]
    body: bytes


@dataclass
class Hook:
    """A scripted endpoint: each request takes the next behaviour ('500', 'reset', 'hang', '404', '302'), then 'ok'."""

    script: list[str] = field(default_factory=list)
    received: list[Received] = field(default_factory=list)
    release: threading.Event = field(default_factory=threading.Event)
    arrived: threading.Event = field(default_factory=threading.Event)
    url: str = ""

    @property
    def accepted(self) -> list[Received]:
        return [r for r in self.received if r.behaviour == "ok"]


def _handler(hook: Hook) -> type[BaseHTTPRequestHandler]:
    lock = threading.Lock()

    class Handler(BaseHTTPRequestHandler):
        def log_message(self, *args: object) -> None:
            pass

        def do_POST(self) -> None:
            body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
            with lock:
                behaviour = hook.script.pop(0) if hook.script else "ok"
                hook.received.append(Received(behaviour, self.headers.get("Idempotency-Key"),
                                              dict(self.headers.items()), body))
            hook.arrived.set()
            if behaviour == "reset":
                self.connection.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
                self.connection.close()
                self.close_connection = True
                return
            if behaviour == "hang":
                hook.release.wait(10)
                self.close_connection = True
                return
            code = {"ok": 200, "500": 500, "404": 404, "302": 302}[behaviour]
            self.send_response(code)
            if code == 302:
                self.send_header("Location", "http://127.0.0.1:1/elsewhere")
            self.send_header("Content-Length", "0")
            self.end_headers()

    return Handler


@pytest.fixture
def hook(monkeypatch: pytest.MonkeyPatch) -> Iterator[Hook]:
    monkeypatch.setenv("no_proxy", "127.0.0.1")
    found = Hook()
    server = ThreadingHTTPServer(("127.0.0.1", 0), _handler(found))
    server.daemon_threads = True
    found.url = f"http://127.0.0.1:{server.server_address[1]}/plimsoll"
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield found
    found.release.set()
    server.shutdown()
    server.server_close()


class Trickle:
    """An endpoint that answers one byte a second for ever: in its status line and headers, or in its body."""

    def __init__(self, where: str) -> None:
        self.where, self.stop, self.requests = where, threading.Event(), 0
        hook = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args: object) -> None:
                pass

            def do_POST(self) -> None:
                self.rfile.read(int(self.headers.get("Content-Length", 0)))
                hook.requests += 1
                if hook.where == "body":
                    self.send_response(200)
                    self.send_header("Content-Length", "1000000")
                    self.end_headers()
                    self.wfile.flush()
                    start = b""
                else:
                    start = b"HTTP/1.1 200 OK\r\nX-Slow: "
                self.close_connection = True
                try:
                    for byte in start:
                        self.wfile.write(bytes([byte]))
                    while not hook.stop.wait(1.0):
                        self.wfile.write(b"a")
                except OSError:
                    pass  # the client gave up

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/slow"
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def close(self) -> None:
        self.stop.set()
        self.server.shutdown()
        self.server.server_close()


class PretendClock(Clock):
    """Starts at the real time; sleeping only moves it forward."""

    def __init__(self) -> None:
        self.start = self.current = Clock().now()
        self.slept: list[float] = []

    def now(self) -> datetime:
        return self.current

    def sleep(self, seconds: float, stop: threading.Event | None = None) -> None:
        self.slept.append(seconds)
        self.current += timedelta(seconds=seconds)


def webhooks(*urls: str, timeout: str = "1s", growth: float = 0.5, max_attempts: int = 6) -> str:
    hooks = "".join(f"  - name: hook{i}\n    url: {u}\n    timeout: {timeout}\n" for i, u in enumerate(urls))
    return (f"webhooks:\n{hooks}notify:\n  growth: {growth}\n  max_attempts: {max_attempts}\n"
            "  backoff: 1s\n  max_backoff: 4s\n")


def outbox(project) -> list[tuple]:
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        return con.execute("SELECT webhook, event, status, attempts, idempotency_key, payload FROM outbox "
                           "ORDER BY seq").fetchall()
    finally:
        con.close()


def built(tmp_path: Path, extra: str):
    project = load_project(known_project(tmp_path, extra))
    run(project)
    return project


def more_hostile_windows(folder: Path, bad_per_window: tuple[int, ...] = (9, 3, 0)) -> None:
    """More windows of the hostile title, by default three: 9 bad (17 affected: +112 %), 3 bad (20: +18 %), then 0."""
    rows = [(f"late-{w}-{i}", START + timedelta(minutes=60 + w * 10 + i, seconds=1), "kids", HOSTILE,
             "E42" if i < bad else None) for w, bad in enumerate(bad_per_window) for i in range(10)]
    write_rows(folder / "lake", SCHEMA, rows, name="part-2.parquet")


def test_retries_until_delivered_once_each_with_a_stable_key(tmp_path: Path, hook: Hook) -> None:
    hook.script = ["500", "500", "reset", "hang"]
    project = built(tmp_path, webhooks(hook.url))
    clock = PretendClock()
    started = time.monotonic()
    result = notify(project, clock=clock, retry_for=timedelta(hours=1))
    assert time.monotonic() - started < 30  # one 1 s timeout and local POSTs, not the pretend waits
    # the first event failed four times (two 500s, a reset, a timeout), backing off 1, 2, 4 and 4 s
    assert [r.behaviour for r in hook.received] == ["500", "500", "reset", "hang", "ok", "ok", "ok", "ok"]
    assert clock.slept == [1.0, 2.0, 4.0, 4.0]
    assert len({r.key for r in hook.received[:5]}) == 1
    assert len({r.body for r in hook.received[:5]}) == 1  # every attempt sends the same bytes
    accepted = [r.key for r in hook.accepted]
    rows = outbox(project)
    assert sorted(accepted) == sorted(k for *_, k, _ in rows) and len(set(accepted)) == 4
    assert [(e, s, a) for _, e, s, a, _, _ in rows] == [
        ("opened", "delivered", 5), ("updated", "delivered", 1), ("opened", "delivered", 1), ("closed", "delivered", 1)]
    assert result.exit_code == 0 and len(result.delivered) == 4 and len(result.failed) == 4
    # a second notify sends nothing more
    again = notify(project, clock=clock)
    assert again.queued == 0 and again.attempts == [] and again.exit_code == 0
    assert len(hook.received) == 8


def test_the_payload_carries_keys_and_counts_only(tmp_path: Path, hook: Hook) -> None:
    project = built(tmp_path, webhooks(hook.url))
    notify(project, clock=PretendClock())
    assert len(hook.received) == 4
    for r in hook.received:
        body = json.loads(r.body)
        assert set(body) == PAYLOAD_KEYS
        assert r.headers["Content-Type"] == "application/json"
        assert r.headers["Idempotency-Key"] == body["idempotency_key"]
        assert r.headers["User-Agent"].startswith("plimsoll/")
        assert b"s-0-" not in r.body and b"s-1-" not in r.body  # no session id anywhere
    opened = json.loads(hook.received[0].body)
    assert {k: opened[k] for k in ("event", "occurred_at", "check", "key", "value", "threshold",
                                   "affected_sessions", "breach_windows", "closed_at")} == {
        "event": "opened", "occurred_at": "2026-11-02T00:49:00Z", "check": "title_errors",
        "key": {"site": "kids", "title_id": "t-1"}, "value": 0.6, "threshold": 0.1, "affected_sessions": 6,
        "breach_windows": 1, "closed_at": None}
    # the words people read: check, key, value against threshold in the measure's unit, who was hit
    assert (opened["measure"], opened["unit"], opened["value_text"], opened["threshold_text"]) == (
        "rate", None, "60 %", "10 %")
    assert opened["summary"] == ("high opened: title_errors site=kids, title_id=t-1: 60 % against a threshold "
                                 "of 10 %; 6 sessions affected in 1 breaching window")
    closed = json.loads(hook.received[3].body)
    assert closed["summary"] == ("high closed (recovered): title_errors site=kids, title_id=t-1: 0 % against a "
                                 "threshold of 10 %; 13 sessions affected in 2 breaching windows")
    assert (closed["event"], closed["close_reason"], closed["closed_at"], closed["affected_sessions"],
            closed["breach_windows"]) == ("closed", "recovered", "2026-11-02T01:09:00Z", 13, 2)
    # the known lake's source names no viewers; every bad session is above a baseline rate of 0
    assert (closed["affected_viewers"], closed["excess_sessions"]) == (None, 13.0)
    # the run made each alert its own incident; the known lake has no attributes, so no causes
    # (tests/test_notify_incidents.py has a lake with both)
    assert (closed["incident_id"], closed["causes"]) == (
        hashlib.md5(f"incident {closed['alert_id']}".encode()).hexdigest()[:16], [])
    assert json.loads(hook.received[2].body)["key"]["title_id"] == HOSTILE


def test_only_new_events_are_queued_and_small_updates_wait_for_growth(tmp_path: Path, hook: Hook) -> None:
    project = built(tmp_path, webhooks(hook.url))
    notify(project, clock=PretendClock())
    assert len(hook.accepted) == 4
    more_hostile_windows(tmp_path)
    run(project)
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.skipped) == (2, 1)
    sent = [json.loads(r.body) for r in hook.accepted[4:]]
    assert [(b["event"], b["affected_sessions"]) for b in sent] == [("updated", 17), ("closed", 20)]
    statuses = [(e, s) for _, e, s, *_ in outbox(project)]
    assert statuses[4:] == [("updated", "delivered"), ("updated", "skipped"), ("closed", "delivered")]
    assert notify(project, clock=PretendClock()).queued == 0 and len(hook.received) == 6


def test_growth_zero_sends_every_update(tmp_path: Path, hook: Hook) -> None:
    project = built(tmp_path, webhooks(hook.url, growth=0))
    more_hostile_windows(tmp_path)
    run(project)
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.skipped) == (7, 0)  # the first run's 4 events and all 3 new ones


def test_attempts_are_bounded_then_abandoned_and_reported(tmp_path: Path, hook: Hook) -> None:
    hook.script = ["500"] * 50
    project = built(tmp_path, webhooks(hook.url, max_attempts=3))
    clock = PretendClock()
    result = notify(project, clock=clock, retry_for=timedelta(minutes=5))
    # each event gets exactly three attempts (waits 1 s, 2 s between them), then is abandoned
    assert len(hook.received) == 12 and len({r.key for r in hook.received}) == 4
    assert all(s == "abandoned" and a == 3 for _, _, s, a, _, _ in outbox(project))
    assert result.exit_code == 1 and result.abandoned_now == 4
    assert clock.current - clock.start == timedelta(seconds=3 * 4)
    later = notify(project, clock=clock)
    assert later.attempts == [] and later.exit_code == 0 and later.abandoned_total == 4
    hook.script = []
    again = notify(project, clock=clock, retry_abandoned=True)
    assert again.retried_abandoned == 4 and len(again.delivered) == 4 and again.exit_code == 0


def test_permanent_refusals_are_not_retried_and_redirects_not_followed(tmp_path: Path, hook: Hook) -> None:
    hook.script = ["404", "302"]
    project = built(tmp_path, webhooks(hook.url))
    result = notify(project, clock=PretendClock(), retry_for=timedelta(minutes=5))
    assert [a.error for a in result.attempts[:2]] == [
        "HTTP 404 Not Found", "HTTP 302 Found to http://127.0.0.1:1 (not followed)"]
    assert [a.status for a in result.attempts] == ["abandoned", "abandoned", "delivered", "delivered"]
    assert len(hook.received) == 4  # nothing reached the redirect target or was sent twice


def test_cli_reports_and_exits_1_while_a_delivery_fails(tmp_path: Path, hook: Hook) -> None:
    hook.script = ["500"]
    project = built(tmp_path, webhooks(hook.url))
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 1, result.output
    lines = result.output.splitlines()
    assert lines[0] == "notify: queued 4 events for 1 webhook"
    assert lines[1].startswith("  failed     hook0: opened site=kids, title_id=t-1 [")
    assert "HTTP 500 Internal Server Error; attempt 2 of 6 at " in lines[1]
    assert lines[-1] == "notify: 0 delivered, 1 failed, 4 waiting, 0 abandoned now"
    time.sleep(1.1)  # the 1 s backoff, in real time for the command line
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    assert result.output.splitlines()[-1] == "notify: 4 delivered, 0 failed, 0 waiting, 0 abandoned now"


def test_a_removed_webhook_gives_up_its_rows(tmp_path: Path, hook: Hook) -> None:
    project = built(tmp_path, webhooks("http://127.0.0.1:9/closed"))
    notify(project, clock=PretendClock())
    text = project.file.read_text().replace("http://127.0.0.1:9/closed", hook.url).replace("hook0", "renamed")
    project.file.write_text(text)
    moved = load_project(project.file)
    result = notify(moved, clock=PretendClock())
    assert result.orphaned == 4 and len(result.delivered) == 4 and result.exit_code == 1
    assert [(w, s) for w, _, s, *_ in outbox(moved)].count(("hook0", "abandoned")) == 4


def test_a_dead_endpoint_never_blocks_or_fails_a_run(tmp_path: Path, hook: Hook) -> None:
    silent = socket.socket()
    silent.bind(("127.0.0.1", 0))
    silent.listen(16)  # accepts connections at the TCP level, never answers
    try:
        project_file = known_project(tmp_path, webhooks(f"http://127.0.0.1:{silent.getsockname()[1]}/x",
                                                        "http://127.0.0.1:9/refused", hook.url, timeout="3s"))
        first = CliRunner().invoke(main, ["run", "-p", str(project_file)])
        assert first.exit_code == 0, first.output
        silent.settimeout(0)
        with pytest.raises(BlockingIOError):
            silent.accept()  # the run never tried to reach any webhook
        assert hook.received == []
        # while notify waits on a hanging endpoint, a run in another process gets the warehouse
        hook.script = ["hang"]
        project = load_project(project_file)
        done: list = []
        worker = threading.Thread(target=lambda: done.append(notify(project)))
        worker.start()
        assert hook.arrived.wait(30)
        second = subprocess.run(plimsoll_command("run", "-p", str(project_file)),
                                capture_output=True, text=True, timeout=120)
        assert second.returncode == 0, second.stderr
        hook.release.set()
        worker.join(60)
        assert not worker.is_alive()
        (result,) = done
        # the silent and the refusing endpoint each failed once and wait; the third timed out once
        assert result.exit_code == 1 and len(result.failed) == 3 and result.waiting == 12
        assert {a.error.split(":")[0] for a in result.failed} >= {"no answer within 3 s", "cannot reach http"}
    finally:
        silent.close()


def test_notify_names_the_run_holding_the_warehouse(tmp_path: Path) -> None:
    project = built(tmp_path, webhooks("http://127.0.0.1:9/x"))
    with warehouse_held(project.warehouse) as holder:
        result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
        assert result.exit_code == 1
        assert "in use by another process" in result.output
        assert f"PID {holder.pid}" in result.output


def test_one_notify_at_a_time(tmp_path: Path) -> None:
    project = built(tmp_path, webhooks("http://127.0.0.1:9/x"))
    with _single_notifier(project):
        with pytest.raises(PlimsollError, match="another `plimsoll notify` is delivering"):
            notify(project)


def test_without_webhooks_there_is_nothing_to_send(tmp_path: Path) -> None:
    project = built(tmp_path, "")
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    assert result.output == "notify: no webhooks or email in the project file; nothing to send\n"
    assert outbox(project) == []


def test_a_success_not_yet_recorded_is_sent_again_with_the_same_key(tmp_path: Path, hook: Hook,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    import toolkit.outputs.delivery as outbox_module

    project = built(tmp_path, webhooks(hook.url))
    recorded = outbox_module._record

    def die_before_commit(*args: object, **kwargs: object) -> None:
        raise KeyboardInterrupt  # the process is killed between the POST's success and its commit

    monkeypatch.setattr(outbox_module, "_record", die_before_commit)
    with pytest.raises(KeyboardInterrupt):
        notify(project, clock=PretendClock())
    monkeypatch.setattr(outbox_module, "_record", recorded)
    result = notify(project, clock=PretendClock())
    assert len(result.delivered) == 4 and len(hook.received) == 5
    first, resent = hook.received[0], hook.received[1]
    assert (first.key, first.body) == (resent.key, resent.body)  # at least once, with the same key and bytes
    assert len({r.key for r in hook.received[1:]}) == 4


@pytest.mark.parametrize("where", ["headers", "body"])
def test_a_trickling_endpoint_is_cut_at_its_timeout_and_never_delays_the_others(
        tmp_path: Path, hook: Hook, where: str) -> None:
    slow = Trickle(where)
    try:
        project = built(tmp_path, webhooks(slow.url, hook.url, timeout="2s"))
        done: list = []
        worker = threading.Thread(target=lambda: done.append(notify(project)), daemon=True)
        worker.start()
        worker.join(30)  # a generous bound: proves notify does not hang, measures nothing
        assert not worker.is_alive(), "notify hung on an endpoint that trickles its answer"
        (result,) = done
    finally:
        slow.close()
    assert slow.requests == 1  # the slow endpoint failed once and rests until its backoff is over
    assert result.exit_code == 1 and len(result.delivered) == 4 and len(hook.accepted) == 4
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        rows = con.execute("SELECT webhook, status, attempts, last_error, last_attempt_at, delivered_at "
                           "FROM outbox ORDER BY seq").fetchall()
    finally:
        con.close()
    slow_rows = [r for r in rows if r[0] == "hook0"]
    healthy = [r for r in rows if r[0] == "hook1"]
    assert [(s, a, e) for _, s, a, e, _, _ in slow_rows] == [
        ("queued", 1, "no answer within 2 s"), ("queued", 0, None), ("queued", 0, None), ("queued", 0, None)]
    assert [s for _, s, *_ in healthy] == ["delivered"] * 4
    # every healthy delivery was recorded before the slow endpoint's deadline ran out
    cut_at = slow_rows[0][4]
    assert all(delivered < cut_at for *_, delivered in healthy)


def all_outbox_text(project) -> str:
    """Every value of every outbox row, as text."""
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        return "\n".join(repr(row) for row in con.execute("SELECT * FROM outbox").fetchall())
    finally:
        con.close()


def test_a_token_in_the_url_is_never_stored_or_printed(tmp_path: Path, hook: Hook) -> None:
    """Webhooks without names whose URLs carry a token in path and query: one refuses connections, one
    answers 500, one redirects to a URL that carries the token again."""
    token = "T0KEN-8f3e2a9c71d4"
    hook.script = ["500", "302"] * 10
    refused = f"http://127.0.0.1:9/hooks/{token}?auth={token}"
    failing = hook.url + f"/{token}?auth={token}"
    text = (f"webhooks:\n  - url: '{refused}'\n    timeout: 1s\n  - url: '{failing}'\n    timeout: 1s\n"
            "notify:\n  backoff: 1s\n  max_backoff: 4s\n")
    project_file = known_project(tmp_path, text)
    assert CliRunner().invoke(main, ["run", "-p", str(project_file)]).exit_code == 0
    printed = CliRunner().invoke(main, ["notify", "-p", str(project_file)])
    assert printed.exit_code == 1, printed.output
    time.sleep(1.1)  # the second attempt (a redirect) after the 1 s backoff, in real time
    printed_again = CliRunner().invoke(main, ["notify", "-p", str(project_file)])
    assert [r.behaviour for r in hook.received][:2] == ["500", "302"]
    output = printed.output + printed_again.output
    assert "cannot reach http://127.0.0.1:9: " in output and "HTTP 500 Internal Server Error" in output
    assert "HTTP 302 Found to http://127.0.0.1:1 (not followed)" in output
    stored = all_outbox_text(load_project(project_file))
    assert "http://127.0.0.1:9'" in stored and "cannot reach http://127.0.0.1:9: " in stored
    for secret in (token, "/hooks/", "auth="):
        assert secret not in output and secret not in stored


def test_library_messages_are_scrubbed_of_the_url_and_header_values() -> None:
    hook = Webhook("h", "https://hooks.fernhill.example/services/T0KEN-4f9a?sig=abc123def")
    text = ("https://hooks.fernhill.example/services/T0KEN-4f9a?sig=abc123def: /services/T0KEN-4f9a rejected "
            "sig=abc123def with Bearer zz-9q8w7e6r")
    assert _hidden(text, hook, {"Authorization": "Bearer zz-9q8w7e6r"}) == (
        "[hidden]: [hidden] rejected [hidden] with [hidden]")
    assert _hidden("cannot reach https://hooks.fernhill.example:443: refused", hook, {}) == (
        "cannot reach https://hooks.fernhill.example:443: refused")


def test_a_header_takes_its_value_from_an_environment_variable(tmp_path: Path, hook: Hook,
                                                                monkeypatch: pytest.MonkeyPatch) -> None:
    secret = "Bearer s3cr3t-4b1d9e"
    monkeypatch.setenv("FERNHILL_HOOK_AUTH", secret)
    hook.script = ["500"]
    text = (f"webhooks:\n  - name: on-call\n    url: {hook.url}\n    timeout: 1s\n"
            "    headers:\n      Authorization: FERNHILL_HOOK_AUTH\n      X-Team: FERNHILL_TEAM\n"
            "notify:\n  backoff: 1s\n")
    monkeypatch.setenv("FERNHILL_TEAM", "playback")
    project_file = known_project(tmp_path, text)
    assert CliRunner().invoke(main, ["run", "-p", str(project_file)]).exit_code == 0
    printed = CliRunner().invoke(main, ["notify", "-p", str(project_file), "--retry-for", "5s"])
    assert printed.exit_code == 0, printed.output
    assert len(hook.received) == 5 and len(hook.accepted) == 4
    assert {(r.headers["Authorization"], r.headers["X-Team"]) for r in hook.received} == {(secret, "playback")}
    assert secret not in printed.output and secret not in all_outbox_text(load_project(project_file))
    assert all(secret.encode() not in r.body for r in hook.received)


def test_a_missing_header_variable_sends_nothing_to_that_webhook(tmp_path: Path, hook: Hook,
                                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("FERNHILL_HOOK_AUTH", raising=False)
    other = Hook()
    server = ThreadingHTTPServer(("127.0.0.1", 0), _handler(other))
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        text = (f"webhooks:\n  - name: on-call\n    url: {hook.url}\n    headers:\n"
                "      Authorization: FERNHILL_HOOK_AUTH\n"
                f"  - name: archive\n    url: http://127.0.0.1:{server.server_address[1]}/in\n")
        project_file = known_project(tmp_path, text)
        assert CliRunner().invoke(main, ["run", "-p", str(project_file)]).exit_code == 0
        printed = CliRunner().invoke(main, ["notify", "-p", str(project_file)])
    finally:
        server.shutdown()
        server.server_close()
    assert printed.exit_code == 1, printed.output
    assert ("  not sent   on-call: environment variable FERNHILL_HOOK_AUTH (header Authorization) is not set; "
            "nothing sent to this webhook") in printed.output.splitlines()
    assert hook.received == [] and len(other.accepted) == 4  # the other webhook is served as usual
    assert printed.output.splitlines()[-1] == "notify: 4 delivered, 0 failed, 4 waiting, 0 abandoned now"



def test_rows_an_earlier_version_kept_under_a_full_url_are_moved_and_scrubbed(tmp_path: Path, hook: Hook) -> None:
    """Before webhooks without a name were known by scheme://host:port, their rows carried the full URL
    (token included) as name and url. The upgrade keeps them as the same endpoint, sends nothing twice,
    and leaves no token behind in those rows."""
    token = "T0KEN-77c1e0b5aa"
    url = hook.url + f"/{token}"
    project = built(tmp_path, f"webhooks:\n  - url: '{url}'\n")
    assert len(notify(project, clock=PretendClock()).delivered) == 4
    con = duckdb.connect(str(project.warehouse))
    try:  # as the earlier version wrote them
        con.execute("UPDATE outbox SET webhook = $u, url = $u", {"u": url})
        con.execute("UPDATE outbox SET last_error = 'cannot reach ' || $u || ': timed out' WHERE event = 'closed'",
                    {"u": url})
    finally:
        con.close()
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.orphaned, result.attempts) == (0, 0, [])
    assert len(hook.received) == 4
    assert {w for w, *_ in outbox(project)} == {project.webhooks[0].name} == {hook.url.rsplit("/", 1)[0]}
    assert token not in all_outbox_text(project)


def rebuild(project, old: str, new: str):
    """Change the check file, see the plain run refuse, and rebuild the check as the refusal says."""
    path = project.checks_dir / "title_errors.yml"
    text = path.read_text()
    assert old in text
    path.write_text(text.replace(old, new))
    refused = CliRunner().invoke(main, ["run", "-p", str(project.file)])
    assert refused.exit_code == 2 and "--rebuild" in refused.output, refused.output
    rebuilt = CliRunner().invoke(main, ["run", "-p", str(project.file), "--check", "title_errors", "--rebuild"])
    assert rebuilt.exit_code == 0, rebuilt.output
    return load_project(project.file)


def query(project, sql: str) -> list[tuple]:
    return warehouse_query(project, sql)


def test_a_rebuild_with_a_changed_factor_sends_no_incident_again(tmp_path: Path, hook: Hook) -> None:
    project = built(tmp_path, webhooks(hook.url))
    notify(project, clock=PretendClock())
    assert len(hook.accepted) == 4  # t-1: opened, updated, closed; the hostile title: opened
    changed = rebuild(project, "factor: 1,", "factor: 1.05,")
    # the same two incidents, each now under two alert ids: the old definition's and the rebuilt one
    assert query(changed, "SELECT key_text, count(DISTINCT alert_id), list(status ORDER BY first_run_id), "
                          "list(close_reason ORDER BY first_run_id) FROM alerts GROUP BY fingerprint, opened_at, "
                          "key_text ORDER BY key_text") == [
        (f"site=kids, title_id={key_value(HOSTILE)}", 2, ["closed", "open"], ["check changed", None]),
        ("site=kids, title_id=t-1", 2, ["closed", "closed"], ["recovered", "recovered"])]
    result = notify(changed, clock=PretendClock())
    assert (result.queued, result.attempts, len(hook.received)) == (0, [], 4)
    # the old definition's close of the incident that goes on is decided once, as skipped
    assert query(changed, "SELECT event, status, skip_reason FROM outbox WHERE enqueued_at > "
                          "(SELECT min(enqueued_at) FROM outbox)") == [("closed", "skipped", "rebuilt")]
    assert "(1 'check changed' close of an incident the rebuilt check goes on with skipped)" in \
        describe(changed, result).splitlines()[0]
    assert notify(changed, clock=PretendClock()).queued == 0
    # growth is measured against what the webhook was told of the incident (8 affected, under the old
    # alert id): 10 is not half as many again, 19 is, then it recovers
    more_hostile_windows(tmp_path, (2, 9, 0))
    run(changed)
    result = notify(changed, clock=PretendClock())
    assert (result.queued, result.skipped_for) == (2, {"growth": 1})
    sent = [json.loads(r.body) for r in hook.accepted[4:]]
    assert [(b["event"], b["affected_sessions"], b["close_reason"]) for b in sent] == [
        ("updated", 19, None), ("closed", 19, "recovered")]


def test_a_rebuild_that_no_longer_flags_an_open_incident_closes_it_once(tmp_path: Path, hook: Hook) -> None:
    project = built(tmp_path, webhooks(hook.url))
    notify(project, clock=PretendClock())
    assert len(hook.accepted) == 4
    changed = rebuild(project, "floor: 0.1", "floor: 0.9")  # no window is above 0.9: no alert at all now
    assert query(changed, "SELECT count(*) FROM alerts WHERE status = 'open'") == [(0,)]
    result = notify(changed, clock=PretendClock())
    assert result.queued == 1 and len(hook.accepted) == 5
    closed = json.loads(hook.accepted[4].body)
    assert (closed["event"], closed["close_reason"], closed["key"]["title_id"]) == ("closed", "check changed", HOSTILE)
    assert closed["alert_id"] == json.loads(hook.accepted[2].body)["alert_id"]  # the alert it opened
    assert notify(changed, clock=PretendClock()).queued == 0 and len(hook.received) == 5


OLD_OUTBOX = """
CREATE TABLE outbox (
    idempotency_key VARCHAR PRIMARY KEY, webhook VARCHAR, url VARCHAR, alert_id VARCHAR, run_id BIGINT,
    event VARCHAR, occurred_at TIMESTAMP, affected_sessions BIGINT, payload VARCHAR, status VARCHAR,
    attempts INTEGER, last_error VARCHAR, seq BIGINT, enqueued_at TIMESTAMP, last_attempt_at TIMESTAMP,
    next_attempt_at TIMESTAMP, delivered_at TIMESTAMP)
"""


def test_a_warehouse_from_before_incident_identities_sends_nothing_twice(tmp_path: Path, hook: Hook) -> None:
    """An outbox as the first release wrote it: without the incident columns, keyed by alert id."""
    project = built(tmp_path, webhooks(hook.url))
    notify(project, clock=PretendClock())
    con = duckdb.connect(str(project.warehouse))
    try:
        con.execute("CREATE TEMP TABLE delivered AS SELECT * FROM outbox")
        con.execute("DROP TABLE outbox")
        con.execute(OLD_OUTBOX)
        con.execute("""
            INSERT INTO outbox SELECT
                md5(to_json({'event': md5(to_json({'alert_id': alert_id, 'event': event, 'occurred_at': occurred_at,
                                                   'affected_sessions': affected_sessions})::VARCHAR),
                             'webhook': webhook})::VARCHAR),
                webhook, url, alert_id, run_id, event, occurred_at, affected_sessions, payload, status, attempts,
                last_error, seq, enqueued_at, last_attempt_at, next_attempt_at, delivered_at
            FROM delivered""")
    finally:
        con.close()
    assert notify(project, clock=PretendClock()).queued == 0
    assert query(project, "SELECT count(*) FROM outbox WHERE event_identity IS NULL OR fingerprint IS NULL") == [(0,)]
    # and a rebuild after the upgrade resends nothing either
    changed = rebuild(project, "factor: 1,", "factor: 1.05,")
    assert notify(changed, clock=PretendClock()).queued == 0 and len(hook.received) == 4


def history_project(folder: Path, extra: str):
    """Two weeks of data time: on day 0 an incident of t-1 that closed and one of the hostile title
    that is still open (its series went quiet, and expires only after 30 days); on day 14, an incident
    of t-9 that opened, grew and closed. Run, so the warehouse has that history."""
    recent = session_rows({"t-9": [0, 0, 0, 0, 6, 7, 0]})
    recent = [(f"r-{sid}", at + timedelta(days=14), site, "t-9", code) for sid, at, site, _, code in recent]
    write_rows(folder / "lake", SCHEMA, recent, name="day-14.parquet")
    check = CHECK.replace("expire_after: 7d", "expire_after: 30d")
    # later tests add sessions of day 0 after day 14 was read: remember ids that long
    horizon = "    dedup_horizon: 30d\n"
    project = load_project(known_project(folder, horizon + extra, checks={"title_errors.yml": check}))
    run(project)
    return project


def test_a_new_webhook_starts_from_now_in_data_time(tmp_path: Path, hook: Hook) -> None:
    project = history_project(tmp_path, webhooks(hook.url))
    assert query(project, "SELECT key_text, status FROM alerts ORDER BY opened_at") == [
        ("site=kids, title_id=t-1", "closed"), (f"site=kids, title_id={key_value(HOSTILE)}", "open"),
        ("site=kids, title_id=t-9", "closed")]
    result = notify(project, clock=PretendClock())
    # the data is weeks older than the clock; age is measured against the newest data (day 14, 01:09)
    sent = [json.loads(r.body) for r in hook.accepted]
    assert [(b["event"], b["key"]["title_id"], b["occurred_at"]) for b in sent] == [
        ("opened", HOSTILE, "2026-11-02T00:59:01Z"),   # older than a day, but the alert is still open
        ("opened", "t-9", "2026-11-16T00:49:00Z"),
        ("updated", "t-9", "2026-11-16T00:59:00Z"),
        ("closed", "t-9", "2026-11-16T01:09:00Z")]
    assert (result.queued, result.skipped_for) == (4, {"catch_up": 3})
    assert describe(project, result).splitlines()[0] == (
        "notify: queued 4 events for 1 webhook (3 events older than catch_up skipped)")
    assert query(project, "SELECT event, status, skip_reason FROM outbox WHERE status = 'skipped' ORDER BY seq") == [
        ("opened", "skipped", "catch_up"), ("updated", "skipped", "catch_up"), ("closed", "skipped", "catch_up")]
    again = notify(project, clock=PretendClock())
    assert (again.queued, again.skipped, again.attempts) == (0, 0, [])
    # from now on every new event is news, the old incident's update included
    more_hostile_windows(tmp_path, (9, 0))
    run(project)
    later = notify(project, clock=PretendClock())
    assert (later.queued, later.skipped) == (2, 0)
    assert [(json.loads(r.body)["event"], json.loads(r.body)["affected_sessions"]) for r in hook.accepted[4:]] == [
        ("updated", 17), ("closed", 17)]


def test_catch_up_can_reach_back_as_far_as_wanted(tmp_path: Path, hook: Hook) -> None:
    text = webhooks(hook.url).replace("    timeout: 1s\n", "    timeout: 1s\n    catch_up: 3w\n")
    project = history_project(tmp_path, text)
    assert project.webhooks[0].catch_up == timedelta(weeks=3)
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.skipped) == (7, 0) and len(hook.accepted) == 7



def test_a_reopened_alert_is_sent_and_each_of_its_closes_once(tmp_path: Path, hook: Hook) -> None:
    from conftest import PLAIN_PROJECT, write_project
    from test_lifecycle import FLAPPING, HOURS, flapping_rows

    lake = write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN",
                      flapping_rows({h: c for h, c in HOURS.items() if h <= 9}))
    project = load_project(write_project(tmp_path, {"flapping.yml": FLAPPING},
                                         PLAIN_PROJECT.format(lake=lake) + webhooks(hook.url, growth=0)))
    run(project)
    notify(project, clock=PretendClock())
    sent = [json.loads(r.body) for r in hook.accepted]
    assert [(b["event"], b["occurred_at"][11:16], b["affected_sessions"], b["close_reason"]) for b in sent] == [
        ("opened", "02:00", 5, None), ("closed", "04:00", 5, "recovered"),
        ("reopened", "05:00", 10, None), ("closed", "07:00", 10, "recovered")]
    assert len({b["alert_id"] for b in sent}) == 1 and len({b["idempotency_key"] for b in sent}) == 4
    # the rest of the day: a new alert; nothing sent twice
    write_rows(tmp_path / "lake", "session_id VARCHAR, ended_at TIMESTAMP, failed BOOLEAN",
               flapping_rows({h: c for h, c in HOURS.items() if h > 9}), name="later.parquet")
    run(project)
    notify(project, clock=PretendClock())
    later = [json.loads(r.body) for r in hook.accepted[4:]]
    assert [(b["event"], b["occurred_at"][11:16]) for b in later] == [("opened", "15:00"), ("updated", "16:00")]
