"""Webhooks and incidents: alert payloads carry their incident and causes, and a webhook with
`per: incident` is sent each incident event once, over the known lake's warehouse with its causes
and incidents written by hand (see tests/known_lake.py) and the local HTTP receiver of
tests/test_notify.py."""

from __future__ import annotations

import json
from datetime import timedelta
from pathlib import Path

import duckdb
from click.testing import CliRunner

from known_lake import HOSTILE, HOSTILE_PLAYER, fill_incidents, known_project
from test_notify import Hook, PretendClock, hook  # noqa: F401 (hook is a fixture)
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.outputs.delivery import notify

INCIDENT_KEYS = {"idempotency_key", "event", "occurred_at", "incident_id", "status", "opened_at", "closed_at",
                 "cause", "alert_ids", "alerts", "severity", "affected_sessions", "affected_viewers", "causes",
                 "run_id", "sender"}


def hooks(*entries: tuple[str, str], growth: float = 0.5, catch_up: str = "52w") -> str:
    """``webhooks:`` with one entry per (url, per)."""
    text = "".join(f"  - name: hook{i}\n    url: {url}\n    timeout: 1s\n    per: {per}\n    catch_up: {catch_up}\n"
                   for i, (url, per) in enumerate(entries))
    return f"webhooks:\n{text}notify:\n  growth: {growth}\n  max_attempts: 3\n  backoff: 1s\n  max_backoff: 4s\n"


def filled(tmp_path: Path, extra: str):
    project = load_project(known_project(tmp_path, extra))
    run(project)
    return project, fill_incidents(project.warehouse)


def add_events(project, rows: list[tuple]) -> None:
    """More events of the open incident: (run_id, minutes after its opening, event, alerts, affected)."""
    con = duckdb.connect(str(project.warehouse))
    try:
        for run_id, minutes, event, alerts, affected in rows:
            con.execute(
                "INSERT INTO incident_events SELECT incident_id, $run, opened_at + to_minutes($m), $event, "
                "CASE WHEN $event = 'closed' THEN 'closed' ELSE 'open' END, cause_alert_id, $alerts, "
                "alert_ids || list_transform(range($alerts - 1), lambda n: 'joined-' || n), $affected, NULL "
                "FROM incidents WHERE incident_id = 'inc-open'",
                {"run": run_id, "m": minutes, "event": event, "alerts": alerts, "affected": affected})
    finally:
        con.close()


def test_alert_payloads_carry_their_incident_and_significant_causes(tmp_path: Path, hook: Hook) -> None:
    project, ids = filled(tmp_path, hooks((hook.url, "alert")))
    notify(project, clock=PretendClock())
    bodies = [json.loads(r.body) for r in hook.accepted]
    assert [b["event"] for b in bodies] == ["opened", "updated", "opened", "closed"]
    assert {b["alert_id"]: b["incident_id"] for b in bodies} == {ids["closed"]: "inc-closed",
                                                                 ids["hostile"]: "inc-open"}
    closed = [b for b in bodies if b["alert_id"] == ids["closed"]]
    # only the significant cause, never the row below it
    assert all(b["causes"] == [{"rank": 1, "key": {"cdn": "birch", "country": "DE"}, "key_text": "cdn=birch, country=DE",
                                "bad": 11.0, "expected": 1.5, "excess_share": 0.81}] for b in closed)
    hostile = [b for b in bodies if b["alert_id"] == ids["hostile"]]
    assert hostile[0]["causes"][0]["key"] == {"player_version": HOSTILE_PLAYER}
    assert all(b"s-0-" not in r.body and b"s-1-" not in r.body for r in hook.accepted)  # no session ids
    assert all(incident is None for *_, incident in outbox_incidents(project))  # alert rows, not incident rows


def outbox_incidents(project) -> list[tuple]:
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        return con.execute("SELECT webhook, event, status, incident_id FROM outbox ORDER BY seq").fetchall()
    finally:
        con.close()


def test_a_webhook_per_incident_gets_each_incident_event_once(tmp_path: Path, hook: Hook) -> None:
    project, ids = filled(tmp_path, hooks((hook.url, "incident")))
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.skipped, result.exit_code) == (3, 0, 0)
    bodies = [json.loads(r.body) for r in hook.accepted]
    assert [(b["incident_id"], b["event"]) for b in bodies] == [
        ("inc-closed", "opened"), ("inc-open", "opened"), ("inc-closed", "closed")]
    for r, body in zip(hook.accepted, bodies):
        assert set(body) == INCIDENT_KEYS
        assert r.headers["Idempotency-Key"] == body["idempotency_key"]
        assert b"s-0-" not in r.body and b"s-1-" not in r.body
    assert bodies[2] == {
        "idempotency_key": bodies[2]["idempotency_key"], "event": "closed", "occurred_at": "2026-11-02T01:09:00Z",
        "incident_id": "inc-closed", "status": "closed", "opened_at": "2026-11-02T00:49:00Z",
        "closed_at": "2026-11-02T01:09:00Z",
        "cause": {"check": "title_errors", "key": {"site": "kids", "title_id": "t-1"},
                  "key_text": "site=kids, title_id=t-1", "split_value": None, "alert_id": ids["closed"]},
        "alert_ids": [ids["closed"]], "alerts": 1, "severity": "high", "affected_sessions": 13,
        "affected_viewers": None,
        "causes": [{"rank": 1, "key": {"cdn": "birch", "country": "DE"}, "key_text": "cdn=birch, country=DE",
                    "bad": 11.0, "expected": 1.5, "excess_share": 0.81}],
        "run_id": 1, "sender": bodies[2]["sender"],
    }
    assert bodies[1]["cause"]["key"] == {"site": "kids", "title_id": HOSTILE}
    assert [(e, s, i) for _, e, s, i in outbox_incidents(project)] == [
        ("opened", "delivered", "inc-closed"), ("opened", "delivered", "inc-open"), ("closed", "delivered", "inc-closed")]
    # nothing queued or sent twice
    again = notify(project, clock=PretendClock())
    assert (again.queued, again.skipped, again.attempts) == (0, 0, [])
    assert len(hook.received) == 3


def test_updates_are_sent_when_alerts_join_or_the_incident_grows(tmp_path: Path, hook: Hook) -> None:
    project, _ = filled(tmp_path, hooks((hook.url, "incident")))
    notify(project, clock=PretendClock())
    assert len(hook.accepted) == 3
    # the open incident (8 affected when opened): an alert joins; it grows 8 -> 10 (+25 %: kept back);
    # 8 -> 12 (+50 %: sent); then it closes
    add_events(project, [(2, 10, "updated", 2, 8), (3, 20, "updated", 2, 10), (4, 30, "updated", 2, 12),
                         (5, 40, "closed", 2, 12)])
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.skipped, result.skipped_for) == (3, 1, {"growth": 1})
    sent = [json.loads(r.body) for r in hook.accepted[3:]]
    assert [(b["event"], b["alerts"], b["affected_sessions"]) for b in sent] == [
        ("updated", 2, 8), ("updated", 2, 12), ("closed", 2, 12)]
    assert sent[0]["alert_ids"][1] == "joined-0"
    statuses = [(e, s) for _, e, s, _ in outbox_incidents(project)][3:]
    assert statuses == [("updated", "delivered"), ("updated", "skipped"), ("updated", "delivered"),
                        ("closed", "delivered")]
    assert notify(project, clock=PretendClock()).queued == 0 and len(hook.received) == 6


def test_growth_is_measured_against_what_earlier_notifies_sent(tmp_path: Path, hook: Hook) -> None:
    project, _ = filled(tmp_path, hooks((hook.url, "incident")))
    notify(project, clock=PretendClock())
    add_events(project, [(2, 10, "updated", 1, 11)])   # +37 % over the 8 sent: kept back
    assert notify(project, clock=PretendClock()).skipped_for == {"growth": 1}
    add_events(project, [(3, 20, "updated", 1, 12)])   # +50 % over the 8 sent: sent
    assert notify(project, clock=PretendClock()).queued == 1
    assert json.loads(hook.accepted[-1].body)["affected_sessions"] == 12


def test_alert_and_incident_webhooks_side_by_side(tmp_path: Path, hook: Hook) -> None:
    other = Hook()
    from test_notify import _handler
    from http.server import ThreadingHTTPServer
    import threading

    server = ThreadingHTTPServer(("127.0.0.1", 0), _handler(other))
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/incidents"
        project, _ = filled(tmp_path, hooks((hook.url, "alert"), (url, "incident")))
        result = notify(project, clock=PretendClock())
        assert result.queued == 7 and result.exit_code == 0
        assert [json.loads(r.body)["event"] for r in hook.accepted] == ["opened", "updated", "opened", "closed"]
        assert all("check" in json.loads(r.body) for r in hook.accepted)
        assert [json.loads(r.body)["incident_id"] for r in other.accepted] == ["inc-closed", "inc-open", "inc-closed"]
        assert all("cause" in json.loads(r.body) for r in other.accepted)
        assert notify(project, clock=PretendClock()).queued == 0
    finally:
        server.shutdown()
        server.server_close()


def test_a_new_incident_webhook_starts_from_now(tmp_path: Path, hook: Hook) -> None:
    project, _ = filled(tmp_path, hooks((hook.url, "incident"), catch_up="0s"))
    result = notify(project, clock=PretendClock())
    # the closed incident is history; the opening of the open one is sent however old
    assert (result.queued, result.skipped_for) == (1, {"catch_up": 2})
    assert [(json.loads(r.body)["incident_id"], json.loads(r.body)["event"]) for r in hook.accepted] == [
        ("inc-open", "opened")]
    add_events(project, [(2, 10, "updated", 2, 8)])
    assert notify(project, clock=PretendClock()).queued == 1  # after the first pass, every new event


def test_the_command_line_names_the_incident(tmp_path: Path, hook: Hook) -> None:
    project, _ = filled(tmp_path, hooks((hook.url, "incident")))
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0] == "notify: queued 3 events for 1 webhook"
    assert lines[1] == "  delivered  hook0: incident opened, cause site=kids, title_id=t-1 [inc-closed]"
    assert lines[-1] == "notify: 3 delivered, 0 failed, 0 waiting, 0 abandoned now"


def test_a_failed_incident_delivery_is_retried_with_the_same_key(tmp_path: Path, hook: Hook) -> None:
    hook.script = ["500"]
    project, _ = filled(tmp_path, hooks((hook.url, "incident")))
    result = notify(project, clock=PretendClock(), retry_for=timedelta(minutes=1))
    assert result.exit_code == 0 and len(result.delivered) == 3 and len(hook.received) == 4
    assert (hook.received[0].key, hook.received[0].body) == (hook.received[1].key, hook.received[1].body)
