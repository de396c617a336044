"""Webhooks and incidents: alert payloads carry their incident and causes, and a webhook with
`per: incident` is sent each incident event once, over the incidents and causes real runs computed
on the lake of tests/incident_lake.py (read file by file), with the local HTTP receiver of
tests/test_notify.py."""

from __future__ import annotations

import json
from datetime import timedelta
from pathlib import Path

import pytest
from conftest import warehouse_query
from click.testing import CliRunner

import incident_lake
from incident_lake import HOSTILE_PLAYER, at, files, land
from test_notify import Hook, PretendClock, hook  # noqa: F401 (hook is a fixture)
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.outputs.delivery import notify

INCIDENT_KEYS = {"idempotency_key", "event", "occurred_at", "incident_id", "status", "opened_at", "closed_at",
                 "merged_into", "cause", "alert_ids", "alerts", "severity", "affected_sessions", "affected_viewers",
                 "causes", "run_id", "sender", "summary"}
# the incidents of the lake (tests/incident_lake.py): the CDN in DE, the site incident that merged
# into it, a short CDN alert in FR, and at the end the open CDN incident in FR, its merged site one
# and a site alert of its own (its answer did not narrow to the CDN). Ids follow the alerts' ids,
# which follow the checks' definition hashes: of the two site incidents opened at 16:30, the one
# that stays (and becomes the CDN's) is site=news's, and NEWS names the one merged into it.
BIRCH_DE, NEWS, BIRCH_FR, CEDAR_FR, SPORT, NEWS_FR = ("c3a1e7d355a53142", "246f617ee826aa14", "d9f1e7ec9e39f425",
                                                      "5ba65235a6aec75c", "00394b0b6c9aacbb", "fdb4fe30b5f82899")
# the events of incident_events, in data-time order, each sent once (nothing waits for growth here)
EVENTS = [(NEWS, "opened", "open"), (BIRCH_DE, "opened", "open"), (BIRCH_DE, "updated", "open"),
          (NEWS, "closed", "merged"), (BIRCH_DE, "updated", "open"), (BIRCH_DE, "closed", "closed"),
          (BIRCH_DE, "reopened", "open"), (BIRCH_FR, "opened", "open"), (BIRCH_DE, "updated", "open"),
          (BIRCH_DE, "closed", "closed"), (BIRCH_FR, "closed", "closed"), (CEDAR_FR, "opened", "open"),
          (NEWS_FR, "opened", "open"), (SPORT, "opened", "open"), (CEDAR_FR, "updated", "open"),
          (SPORT, "closed", "merged")]


def hooks(*entries: tuple[str, str], growth: float = 0.5, catch_up: str = "52w") -> str:
    """``webhooks:`` with one entry per (url, per)."""
    text = "".join(f"  - name: hook{i}\n    url: {url}\n    timeout: 1s\n    per: {per}\n    catch_up: {catch_up}\n"
                   for i, (url, per) in enumerate(entries))
    return f"webhooks:\n{text}notify:\n  growth: {growth}\n  max_attempts: 3\n  backoff: 1s\n  max_backoff: 4s\n"


@pytest.fixture
def made(tmp_path: Path, tmp_path_factory: pytest.TempPathFactory):
    """The lake's project as after the run of file ``step`` (None: the last), with ``extra`` webhooks."""
    def make(extra: str, step: int | None = None):
        return load_project(at(tmp_path_factory, tmp_path / "p", step, extra))
    return make


def query(project, sql: str) -> list[tuple]:
    return warehouse_query(project, sql)


def outbox_incidents(project) -> list[tuple]:
    return query(project, "SELECT webhook, event, status, incident_id FROM outbox ORDER BY seq")


def test_alert_payloads_carry_their_incident_and_significant_causes(made, hook: Hook) -> None:
    project = made(hooks((hook.url, "alert")))
    notify(project, clock=PretendClock())
    bodies = [json.loads(r.body) for r in hook.accepted]
    incidents = dict(query(project, "SELECT alert_id, incident_id FROM alerts"))
    assert bodies and all(b["incident_id"] == incidents[b["alert_id"]] for b in bodies)
    # each alert's significant causes, never the rows below them, as the last run that grew it stored them
    stored: dict[str, list] = {}
    for alert_id, rank, key, key_text in query(project, "SELECT alert_id, rank, key, key_text FROM alert_causes "
                                                        "WHERE significant ORDER BY alert_id, rank"):
        stored.setdefault(alert_id, []).append((rank, dict(key), key_text))
    for b in bodies:
        assert [(c["rank"], c["key"], c["key_text"]) for c in b["causes"]] == stored.get(b["alert_id"], [])
    cedar = [b for b in bodies if b["key_text"] == "cdn=cedar, country=FR"]
    assert cedar and all(b["causes"][0]["key"] == {"player": HOSTILE_PLAYER} for b in cedar)
    assert all(b"s-" not in r.body for r in hook.accepted)  # no session ids
    assert all(incident is None for *_, incident in outbox_incidents(project))  # alert rows, not incident rows


def test_an_alert_opened_before_its_causes_were_recomputed_is_sent_with_them(made, hook: Hook) -> None:
    # The site alerts opened in the run of file 16 and grew in later runs, each replacing their
    # causes: notified only now, their opening carries the causes the warehouse holds (it once
    # looked for causes computed by the opening's run, which the later runs had replaced).
    project = made(hooks((hook.url, "alert")))
    notify(project, clock=PretendClock())
    opened = [json.loads(r.body) for r in hook.accepted]
    opened = [b for b in opened if b["event"] == "opened" and b["key_text"] == "site=news"
              and b["opened_at"] == "2026-11-02T16:30:00Z"]
    assert len(opened) == 1 and opened[0]["run_id"] < query(project, "SELECT max(run_id) FROM alert_causes")[0][0]
    assert [c["key_text"] for c in opened[0]["causes"]] == ["cdn=birch, country=DE"]


def test_a_webhook_per_incident_gets_each_incident_event_once(made, hook: Hook) -> None:
    project = made(hooks((hook.url, "incident")))
    result = notify(project, clock=PretendClock())
    assert (result.queued, result.skipped, result.exit_code) == (len(EVENTS), 0, 0)
    bodies = [json.loads(r.body) for r in hook.accepted]
    assert [(b["incident_id"], b["event"], b["status"]) for b in bodies] == EVENTS
    for r, body in zip(hook.accepted, bodies):
        assert set(body) == INCIDENT_KEYS
        assert r.headers["Idempotency-Key"] == body["idempotency_key"]
        assert b"s-" not in r.body
    (alert_id,) = query(project, "SELECT alert_id FROM alerts WHERE key_text = 'cdn=birch, country=FR' "
                                 "AND opened_at = TIMESTAMP '2026-11-02 23:00:00'")[0]
    assert bodies[10] == {
        "idempotency_key": bodies[10]["idempotency_key"], "event": "closed", "occurred_at": "2026-11-03T01:00:00Z",
        "incident_id": BIRCH_FR, "status": "closed", "opened_at": "2026-11-02T23:00:00Z",
        "closed_at": "2026-11-03T01:00:00Z", "merged_into": None,
        "cause": {"check": "cdn_country", "key": {"cdn": "birch", "country": "FR"},
                  "key_text": "cdn=birch, country=FR", "split_value": None, "alert_id": alert_id,
                  "alarm": None,  # a check's, not a source alarm
                  "peak_value": bodies[10]["cause"]["peak_value"], "threshold": bodies[10]["cause"]["threshold"]},
        "alert_ids": [alert_id], "alerts": 1, "severity": "high", "affected_sessions": 8,
        "affected_viewers": None,
        "causes": [{"rank": 1, "key": {"player": HOSTILE_PLAYER}, "key_text": f"player={HOSTILE_PLAYER}",
                    "bad": 5.0, "expected": 0.52, "excess_share": 0.7028}],
        "run_id": bodies[10]["run_id"], "sender": bodies[10]["sender"], "summary": bodies[10]["summary"],
    }
    assert bodies[10]["summary"] == ("high incident closed: cause cdn_country cdn=birch, country=FR: at worst "
                                     "8.79 % against a threshold of 5.69 %; 1 alert; 8 sessions affected")
    assert 0 < bodies[10]["cause"]["threshold"] < bodies[10]["cause"]["peak_value"] < 1
    assert [(e, s, i) for _, e, s, i in outbox_incidents(project)] == [(e, "delivered", i) for i, e, _ in EVENTS]
    # nothing queued or sent twice
    again = notify(project, clock=PretendClock())
    assert (again.queued, again.skipped, again.attempts) == (0, 0, [])
    assert len(hook.received) == len(EVENTS)


def test_a_merged_incident_is_closed_naming_the_incident_it_joined(made, hook: Hook) -> None:
    # its row is gone from incidents: the close still says when it opened, how severe it was, and where it went
    project = made(hooks((hook.url, "incident")))
    notify(project, clock=PretendClock())
    merged = [json.loads(r.body) for r in hook.accepted if json.loads(r.body)["status"] == "merged"]
    assert [(b["incident_id"], b["event"], b["merged_into"], b["opened_at"], b["severity"]) for b in merged] == [
        (NEWS, "closed", BIRCH_DE, "2026-11-02T16:30:00Z", "medium"),
        (SPORT, "closed", CEDAR_FR, "2026-11-03T08:30:00Z", "medium")]
    assert all(b["closed_at"] == b["occurred_at"] and b["cause"]["key_text"].startswith("site=") for b in merged)
    # the incident it joined was updated first, with the merged one's alert among its own
    bodies = [json.loads(r.body) for r in hook.accepted]
    news = [b for b in bodies if b["incident_id"] == NEWS]
    joined = bodies[bodies.index(news[-1]) - 1]
    assert (joined["incident_id"], joined["event"]) == (BIRCH_DE, "updated")
    assert news[0]["alert_ids"][0] in joined["alert_ids"]


def test_a_reopened_incident_is_sent_as_it_reopens(made, hook: Hook) -> None:
    project = made(hooks((hook.url, "incident")))
    notify(project, clock=PretendClock())
    birch = [json.loads(r.body) for r in hook.accepted if json.loads(r.body)["incident_id"] == BIRCH_DE]
    assert [(b["event"], b["status"], b["closed_at"]) for b in birch] == [
        ("opened", "open", None), ("updated", "open", None), ("updated", "open", None),
        ("closed", "closed", "2026-11-02T20:00:00Z"), ("reopened", "open", None), ("updated", "open", None),
        ("closed", "closed", "2026-11-03T01:00:00Z")]
    assert birch[4]["occurred_at"] == "2026-11-02T22:30:00Z" and birch[4]["opened_at"] == "2026-11-02T16:30:00Z"


def test_updates_wait_for_growth_unless_an_alert_joins(made, tmp_path: Path, hook: Hook) -> None:
    # with growth 3 (+300 %), the CDN incident's updates are sent only when alerts join or its cause changes
    project = made(hooks((hook.url, "incident"), growth=3))
    result = notify(project, clock=PretendClock())
    assert result.skipped_for == {"growth": 2}
    sent = [json.loads(r.body) for r in hook.accepted]
    updates = [(b["incident_id"], b["alerts"], b["affected_sessions"]) for b in sent if b["event"] == "updated"]
    # the CDN alert joins the site's incident (1 -> 3 alerts); 54 -> 118 and -> 183 are kept back;
    # at the end the site=sport alert and a short CDN alert join the CDN in FR (1 -> 3)
    assert updates == [(BIRCH_DE, 3, 54), (CEDAR_FR, 3, 34)]
    assert [s for _, e, s, i in outbox_incidents(project) if e == "updated"] == [
        "delivered", "skipped", "skipped", "delivered"]


def test_growth_is_measured_against_what_earlier_notifies_sent(made, hook: Hook) -> None:
    # notified after the run of file 18 (hour 17: the CDN incident's update to 54 sent), then the
    # runs of the rest of the lake, file by file, and notified again
    project = made(hooks((hook.url, "incident"), growth=1), step=18)
    notify(project, clock=PretendClock())
    assert [json.loads(r.body)["affected_sessions"] for r in hook.accepted
            if json.loads(r.body)["incident_id"] == BIRCH_DE] == [11, 54]
    folder = project.file.parent
    land(folder, 20, lambda i: run(project), start=19)
    result = notify(project, clock=PretendClock())
    # 54 -> 118 is more than double what was sent: sent
    assert json.loads(hook.accepted[-1].body)["affected_sessions"] == 118 and result.queued == 1


def test_alert_and_incident_webhooks_side_by_side(made, hook: Hook) -> None:
    other = Hook()
    from test_notify import _handler
    from http.server import ThreadingHTTPServer
    import threading

    server = ThreadingHTTPServer(("127.0.0.1", 0), _handler(other))
    server.daemon_threads = True
    threading.Thread(target=server.serve_forever, daemon=True).start()
    try:
        url = f"http://127.0.0.1:{server.server_address[1]}/incidents"
        project = made(hooks((hook.url, "alert"), (url, "incident")))
        result = notify(project, clock=PretendClock())
        assert result.exit_code == 0 and result.queued == len(hook.accepted) + len(EVENTS)
        assert all("check" in json.loads(r.body) for r in hook.accepted)
        assert [(json.loads(r.body)["incident_id"], json.loads(r.body)["event"]) for r in other.accepted] == [
            (i, e) for i, e, _ in EVENTS]
        assert notify(project, clock=PretendClock()).queued == 0
    finally:
        server.shutdown()
        server.server_close()


def test_a_new_incident_webhook_starts_from_now(made, hook: Hook) -> None:
    project = made(hooks((hook.url, "incident"), catch_up="0s"))
    result = notify(project, clock=PretendClock())
    # the history is skipped; the opening of the incident still open is sent however old
    assert (result.queued, result.skipped_for) == (2, {"catch_up": len(EVENTS) - 2})
    assert [(json.loads(r.body)["incident_id"], json.loads(r.body)["event"]) for r in hook.accepted] == [
        (CEDAR_FR, "opened"), (NEWS_FR, "opened")]


def test_the_command_line_names_the_incident(made, hook: Hook) -> None:
    project = made(hooks((hook.url, "incident")))
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    lines = result.output.splitlines()
    assert lines[0] == f"notify: queued {len(EVENTS)} events for 1 webhook"
    assert lines[1] == f"  delivered  hook0: incident opened, cause site=sport [{NEWS}]"
    assert lines[2] == f"  delivered  hook0: incident opened, cause site=news [{BIRCH_DE}]"
    assert lines[3] == f"  delivered  hook0: incident updated, cause cdn=birch, country=DE [{BIRCH_DE}]"
    assert lines[4] == f"  delivered  hook0: incident closed (merged into {BIRCH_DE}), cause site=sport [{NEWS}]"
    assert lines[-1] == f"notify: {len(EVENTS)} delivered, 0 failed, 0 waiting, 0 abandoned now"


def test_a_failed_incident_delivery_is_retried_with_the_same_key(made, hook: Hook) -> None:
    hook.script = ["500"]
    project = made(hooks((hook.url, "incident")))
    result = notify(project, clock=PretendClock(), retry_for=timedelta(minutes=1))
    assert result.exit_code == 0 and len(result.delivered) == len(EVENTS) and len(hook.received) == len(EVENTS) + 1
    assert (hook.received[0].key, hook.received[0].body) == (hook.received[1].key, hook.received[1].body)
