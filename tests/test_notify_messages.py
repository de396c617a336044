"""What `plimsoll notify` says: body templates POSTed to a real HTTP server, and mail sent to a real
SMTP server (aiosmtpd) on 127.0.0.1, with STARTTLS and a login, TLS from the start, a server that
refuses and one that drops the connection. Keys are hostile: quotes, backslashes, a line break.
"""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import json
import re
import socket
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import pytest
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword
from click.testing import CliRunner

from conftest import write_rows
from known_lake import CHECK, HOSTILE, SCHEMA, known_project, session_rows
from test_notify import PretendClock, hook  # noqa: F401 (a fixture)
from test_notify import Hook
from toolkit.cli import main
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.outputs.delivery import notify
from toolkit.words import printable

README = Path(__file__).resolve().parent.parent / "README.md"

# a title whose key would break a naive JSON template, a header, or a line
NASTY = 'say "hi"\n\\ {{ x }} \u2028'


def nasty_project(folder: Path, extra: str, check: str = CHECK):
    """The known lake with a third title whose id is hostile for JSON, mail headers and lines."""
    rows = session_rows() + [(f"n-{minute}", r[1], "kids", NASTY, r[4]) for minute, r in
                             enumerate(session_rows({"t-1": [0, 0, 0, 0, 6, 7, 0, 0]}))]
    project = known_project(folder, extra, {"title_errors.yml": check})
    write_rows(folder / "lake", SCHEMA, rows)   # in place of the known lake's one file
    loaded = load_project(project)
    run(loaded)
    return loaded


def readme_block(language: str, containing: str) -> str:
    blocks = re.findall(rf"^```{language}\n(.*?)^```", README.read_text(encoding="utf-8"), re.M | re.S)
    (found,) = [b for b in blocks if containing in b]
    return found


def outbox_rows(project) -> list[tuple]:
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        return con.execute("SELECT webhook, event, status, attempts, last_error, payload, body, content_type "
                           "FROM outbox ORDER BY seq").fetchall()
    finally:
        con.close()


# ── templates ────────────────────────────────────────────────────────────────────────────────────

def test_the_readmes_chat_message_reaches_a_real_server_whatever_the_key(tmp_path: Path, hook: Hook) -> None:
    example = readme_block("yaml", "name: team-chat").replace("https://chat.fernhill.example/hooks/in/T0KEN",
                                                               hook.url)
    project = nasty_project(tmp_path, example)
    result = notify(project, clock=PretendClock())
    assert result.exit_code == 0 and len(hook.accepted) == 7
    texts = []
    for received in hook.accepted:
        assert received.headers["Content-Type"] == "application/json"
        body = json.loads(received.body)
        assert list(body) == ["text"]
        texts.append(body["text"])
    nasty = [t for t in texts if "say" in t]
    # the key inside its string, its line break and control characters escaped as the listings write them
    (key_text,) = {json.loads(r[5])["key_text"] for r in outbox_rows(project) if "say" in r[5]}
    assert "\n" in key_text and nasty and all(printable(key_text) in t and "\n" not in t for t in nasty)
    opened = texts[0]
    assert opened.startswith("high opened: title_errors site=kids, title_id=")
    assert "60 % against a threshold of 10 %; 6 sessions affected in 1 breaching window (report: " \
           "https://plimsoll.fernhill.example/report.html#alert-" in opened
    # the rendered bytes are the outbox's, so a retry sends the same
    rows = [r for r in outbox_rows(project) if r[2] == "delivered"]
    assert sorted(r[6].encode() for r in rows) == sorted(r.body for r in hook.accepted)


def test_the_readmes_default_template_gives_the_default_body(tmp_path: Path, hook: Hook) -> None:
    (tmp_path / "default.json.j2").write_text(readme_block("jinja", '"idempotency_key"'), encoding="utf-8")
    extra = (f"webhooks:\n  - name: plain\n    url: {hook.url}\n"
             f"  - name: templated\n    url: {hook.url}\n    body_file: default.json.j2\n")
    project = nasty_project(tmp_path, extra)
    notify(project, clock=PretendClock())
    rows = outbox_rows(project)
    plain = {json.loads(r[5])["idempotency_key"][:0] + r[1] + json.loads(r[5])["occurred_at"] + str(i): r
             for i, r in enumerate(x for x in rows if x[0] == "plain")}
    sent = {r[0]: [] for r in rows}
    for r in rows:
        sent[r[0]].append(json.loads(r[6]) if r[6] is not None else json.loads(r[5]))
    assert plain and len(sent["plain"]) == len(sent["templated"])
    for default, templated in zip(sent["plain"], sent["templated"]):
        assert {k: v for k, v in templated.items() if k != "idempotency_key"} == \
            {k: v for k, v in default.items() if k != "idempotency_key"}


def test_a_text_template_is_sent_as_text(tmp_path: Path, hook: Hook) -> None:
    extra = (f"webhooks:\n  - url: {hook.url}\n    content_type: text/plain\n"
             "    body: '{{ summary }} [{{ key_text }}]'\n")
    project = nasty_project(tmp_path, extra)
    notify(project, clock=PretendClock())
    bodies = [r.body.decode() for r in hook.accepted]
    assert {r.headers["Content-Type"] for r in hook.accepted} == {"text/plain; charset=utf-8"}  # charset added
    (key_text,) = {json.loads(r[5])["key_text"] for r in outbox_rows(project) if "say" in r[5]}
    assert any(f"[{key_text}]" in b for b in bodies)  # text is written as it is


def test_an_event_the_template_cannot_render_is_abandoned_with_its_error(tmp_path: Path, hook: Hook) -> None:
    # passes validation (the samples' keys are others), fails for one real key
    extra = (f"webhooks:\n  - name: picky\n    url: {hook.url}\n"
             "    body: '{\"t\": \"{% if key_text.endswith(\"t-1\") %}{{ 1 // 0 }}{% endif %}{{ summary }}\"}'\n")
    project = load_project(known_project(tmp_path, extra))
    run(project)
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 1
    lines = [line for line in result.output.splitlines() if "picky:" in line and "abandoned" in line]
    assert len(lines) == 3 and all("body template (" in line and "plimsoll.yml:10): ZeroDivisionError" in line
                                   for line in lines)
    rows = outbox_rows(project)
    assert sorted((r[2], r[4] is not None) for r in rows) == [("abandoned", True)] * 3 + [("delivered", False)]
    assert len(hook.accepted) == 1   # the other title's event went out
    # the template fixed, --retry-abandoned renders those rows with it and sends them
    text = project.file.read_text(encoding="utf-8").replace("{% if key_text.endswith(\"t-1\") %}{{ 1 // 0 }}{% endif %}",
                                                           "fixed: ")
    project.file.write_text(text, encoding="utf-8")
    again = CliRunner().invoke(main, ["notify", "--retry-abandoned", "-p", str(project.file)])
    assert again.exit_code == 0, again.output
    assert [json.loads(r.body)["t"][:20] for r in hook.accepted[1:]] == ["fixed: high opened: ", "fixed: high grew: ti",
                                                                         "fixed: high closed (r"[:20]]


# ── mail ─────────────────────────────────────────────────────────────────────────────────────────

def certificate(folder: Path) -> tuple[Path, Path]:
    """A self-signed certificate for 127.0.0.1 (and its key), made for the test."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import NameOID
    import ipaddress

    key = ec.generate_private_key(ec.SECP256R1())
    name = x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, "127.0.0.1")])
    now = dt.datetime.now(dt.timezone.utc)
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name).public_key(key.public_key())
            .serial_number(x509.random_serial_number()).not_valid_before(now - dt.timedelta(days=1))
            .not_valid_after(now + dt.timedelta(days=2))
            .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]), False)
            .add_extension(x509.BasicConstraints(ca=True, path_length=None), True)
            .sign(key, hashes.SHA256()))
    cert_file, key_file = folder / "cert.pem", folder / "key.pem"
    cert_file.write_bytes(cert.public_bytes(serialization.Encoding.PEM))
    key_file.write_bytes(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                           serialization.NoEncryption()))
    return cert_file, key_file


@dataclass
class Mailroom:
    """A scripted SMTP server: each message takes the next behaviour ('ok', '451', '550-rcpt', '550-data',
    'drop'); then 'ok'. Accepted messages are kept with their envelope."""

    script: list[str] = field(default_factory=list)
    accepted: list[tuple[str, list[str], bytes]] = field(default_factory=list)
    attempts: int = 0
    logins: list[tuple[bytes, bytes]] = field(default_factory=list)
    port: int = 0

    async def handle_RCPT(self, server, session, envelope, address, rcpt_options):  # noqa: N802
        if self.script and self.script[0] == "550-rcpt":
            return "550 5.1.1 no such mailbox"
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server, session, envelope):  # noqa: N802
        self.attempts += 1
        behaviour = self.script.pop(0) if self.script else "ok"
        if behaviour == "drop":
            server.transport.close()
            return "421 closing"
        if behaviour == "451":
            return "451 4.3.0 try again later"
        if behaviour == "550-data":
            return "550 5.7.1 message refused"
        self.accepted.append((envelope.mail_from, list(envelope.rcpt_tos), envelope.original_content))
        return "250 Message accepted"

    def authenticate(self, server, session, envelope, mechanism, auth_data):
        if isinstance(auth_data, LoginPassword):
            self.logins.append((auth_data.login, auth_data.password))
            return AuthResult(success=auth_data.password == b"s3cret horse")
        return AuthResult(success=False)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def mailroom(tmp_path: Path) -> Iterator[tuple[Mailroom, Path]]:
    """STARTTLS required, and a login over it."""
    import ssl

    cert, key = certificate(tmp_path)
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(cert, key)
    room = Mailroom(port=free_port())
    controller = Controller(room, hostname="127.0.0.1", port=room.port, tls_context=context, require_starttls=True,
                            authenticator=room.authenticate, auth_require_tls=True)
    controller.start()
    yield room, cert
    controller.stop()


def mail_settings(port: int, cert: Path | None, security: str = "starttls", per: str = "alert",
                  login: bool = True) -> str:
    text = (f"smtp:\n  host: 127.0.0.1\n  port: {port}\n  security: {security}\n  from: plimsoll@fernhill.example\n"
            "  timeout: 3s\n")
    if cert is not None:
        text += f"  ca_file: {cert}\n"
    if login:
        text += "  user: plimsoll\n  password_env: FERNHILL_SMTP_PASSWORD\n"
    return text + (f"email:\n  - name: on-call-mail\n    per: {per}\n"
                   "    to: [oncall@fernhill.example, video@fernhill.example]\n"
                   "report_url: https://plimsoll.fernhill.example/report.html\n"
                   "notify:\n  backoff: 1s\n  max_backoff: 4s\n  max_attempts: 4\n")


def messages(room: Mailroom) -> list[email.message.EmailMessage]:
    return [email.message_from_bytes(raw, policy=email.policy.default) for _, _, raw in room.accepted]


def test_mail_over_starttls_with_a_login_one_message_per_event(tmp_path: Path, mailroom,
                                                              monkeypatch: pytest.MonkeyPatch) -> None:
    room, cert = mailroom
    monkeypatch.setenv("FERNHILL_SMTP_PASSWORD", "s3cret horse")
    project = nasty_project(tmp_path, mail_settings(room.port, cert))
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 0, result.output
    assert "queued 7 events for 1 mail recipient list" in result.output
    assert room.logins == [(b"plimsoll", b"s3cret horse")] * 7
    found = messages(room)
    assert len(found) == 7
    assert {tuple(to) for _, to, _ in room.accepted} == {("oncall@fernhill.example", "video@fernhill.example")}
    (first,) = [m for m in found if "t-1: 60 %" in m["Subject"]]
    assert first["Subject"] == ("[plimsoll] high opened: title_errors site=kids, title_id=t-1: 60 % against a "
                                "threshold of 10 %; 6 sessions affected in 1 breaching window")
    text = first.get_content().replace("\r\n", "\n")
    assert text.splitlines()[0] == first["Subject"].removeprefix("[plimsoll] ")
    assert re.search(r"^value\s+60 %$", text, re.M) and re.search(r"^check\s+title_errors$", text, re.M)
    assert re.search(r"^threshold\s+10 %$", text, re.M) and re.search(r"^affected\s+6 sessions$", text, re.M)
    assert "report: https://plimsoll.fernhill.example/report.html#alert-" in text
    assert "s-0-" not in text and "s3cret" not in text   # no session id, no password
    # a hostile key adds no header and no line: its line break is written as an escape
    nasty = [m for m in found if "say" in m["Subject"]]
    assert nasty and all("\n" not in m["Subject"] and "\\x0a" in m["Subject"] for m in nasty)
    assert all(len(m.get_all("Subject")) == 1 for m in found)
    # the outbox keeps each message; its Message-ID is the idempotency key
    rows = outbox_rows(project)
    assert [r[2] for r in rows] == ["delivered"] * 7 and {r[7] for r in rows} == {"message/rfc822"}
    assert [m["Message-ID"] for m in found] == [f"<{json.loads(r[5])['idempotency_key']}@fernhill.example>"
                                                 for r in rows]
    again = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert again.exit_code == 0 and len(room.accepted) == 7   # nothing sent twice


def test_mail_per_incident(tmp_path: Path, mailroom, monkeypatch: pytest.MonkeyPatch) -> None:
    room, cert = mailroom
    monkeypatch.setenv("FERNHILL_SMTP_PASSWORD", "s3cret horse")
    project = nasty_project(tmp_path, mail_settings(room.port, cert, per="incident"))
    assert notify(project, clock=PretendClock()).exit_code == 0
    subjects = [m["Subject"] for m in messages(room)]
    assert subjects and all(s.startswith("[plimsoll] high incident ") for s in subjects)
    assert any("cause title_errors site=kids, title_id=t-1: at worst 70 % against a threshold of 10 %" in s
               for s in subjects)


def test_a_server_that_refuses_for_now_is_tried_again_and_one_that_refuses_for_good_is_not(
        tmp_path: Path, mailroom, monkeypatch: pytest.MonkeyPatch) -> None:
    room, cert = mailroom
    monkeypatch.setenv("FERNHILL_SMTP_PASSWORD", "s3cret horse")
    project = nasty_project(tmp_path, mail_settings(room.port, cert))
    room.script = ["451", "550-data"]
    clock = PretendClock()
    first = notify(project, clock=clock)
    assert first.exit_code == 1
    assert [(a.status, a.error) for a in first.attempts[:1]] == [
        ("queued", f"smtp://127.0.0.1:{room.port} refused the message: 451 4.3.0 try again later")]
    # the endpoint rests after a failure: its other rows wait for the next pass
    assert len(first.attempts) == 1 and first.waiting == 7
    clock.current += dt.timedelta(seconds=2)
    second = notify(project, clock=clock)
    assert [(a.status, a.error) for a in second.attempts[:1]] == [
        ("abandoned", f"smtp://127.0.0.1:{room.port} refused the message: 550 5.7.1 message refused")]
    assert second.exit_code == 1 and len(second.delivered) == 6   # a refusal for good does not rest the server
    third = notify(project, clock=clock)
    assert third.exit_code == 0 and third.attempts == []
    assert len(room.accepted) == 6
    room.script = ["550-rcpt"]
    more = nasty_project(tmp_path / "again", mail_settings(room.port, cert))
    refused = notify(more, clock=PretendClock())
    assert refused.attempts[0].status == "abandoned"
    assert "refused every recipient: oncall@fernhill.example (550 5.1.1 no such mailbox)" in refused.attempts[0].error


def test_a_server_that_drops_the_connection_gets_the_message_again(tmp_path: Path, mailroom,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    room, cert = mailroom
    monkeypatch.setenv("FERNHILL_SMTP_PASSWORD", "s3cret horse")
    project = nasty_project(tmp_path, mail_settings(room.port, cert))
    room.script = ["drop"]
    clock = PretendClock()
    first = notify(project, clock=clock, retry_for=dt.timedelta(minutes=1))
    assert first.attempts[0].status == "queued" and "closed the connection" in first.attempts[0].error
    assert first.exit_code == 0 and len(first.delivered) == 7    # retried within --retry-for
    assert room.attempts == 8 and len(room.accepted) == 7   # the dropped message, then each once
    ids = [m["Message-ID"] for m in messages(room)]
    assert len(set(ids)) == 7


def test_tls_from_the_start_and_a_server_that_is_not_there(tmp_path: Path) -> None:
    import ssl

    cert, key = certificate(tmp_path)
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(cert, key)
    room = Mailroom(port=free_port())
    controller = Controller(room, hostname="127.0.0.1", port=room.port, ssl_context=context)
    controller.start()
    try:
        project = nasty_project(tmp_path, mail_settings(room.port, cert, security="tls", login=False))
        assert notify(project, clock=PretendClock()).exit_code == 0
        assert len(room.accepted) == 7
    finally:
        controller.stop()
    # no server on the port now: the connection is refused, and the row waits for a retry
    gone = nasty_project(tmp_path / "gone", mail_settings(room.port, cert, security="tls", login=False))
    result = notify(gone, clock=PretendClock())
    assert result.exit_code == 1 and result.attempts[0].status == "queued"
    assert result.attempts[0].error.startswith(f"cannot reach smtp://127.0.0.1:{room.port}: ")


def test_an_unset_password_variable_sends_no_mail(tmp_path: Path, mailroom, monkeypatch: pytest.MonkeyPatch) -> None:
    room, cert = mailroom
    monkeypatch.delenv("FERNHILL_SMTP_PASSWORD", raising=False)
    project = nasty_project(tmp_path, mail_settings(room.port, cert))
    result = CliRunner().invoke(main, ["notify", "-p", str(project.file)])
    assert result.exit_code == 1
    assert ("not sent   on-call-mail: environment variable FERNHILL_SMTP_PASSWORD (smtp.password_env) is not set; "
            "nothing sent to these recipients") in result.output
    assert room.accepted == [] and {r[2] for r in outbox_rows(project)} == {"queued"}


def test_a_server_without_starttls_is_not_sent_to_in_clear(tmp_path: Path) -> None:
    room = Mailroom(port=free_port())
    controller = Controller(room, hostname="127.0.0.1", port=room.port)
    controller.start()
    try:
        project = nasty_project(tmp_path, mail_settings(room.port, None, login=False))
        result = notify(project, clock=PretendClock())
    finally:
        controller.stop()
    assert room.accepted == []
    assert result.attempts[0].status == "abandoned"
    assert "does not offer STARTTLS" in result.attempts[0].error


def test_a_message_for_each_kind_of_event_is_one_subject_and_readable_lines() -> None:
    from toolkit.config.bodies import samples, variables
    from toolkit.model import Mailbox, Smtp
    from toolkit.outputs.mail import message, subject_text

    box = Mailbox("on-call-mail", ("oncall@fernhill.example",), Smtp("127.0.0.1", 25, "none", "plimsoll@fernhill.example"))
    now = dt.datetime(2026, 11, 16, 9, 43)
    for per in ("alert", "incident"):
        for what, payload, reading in samples(per):
            words = variables(payload, reading, "https://plimsoll.fernhill.example/report.html")
            text = message(box, payload, words, "ab" * 16, now)
            parsed = email.message_from_string(text, policy=email.policy.default)
            assert len(parsed.get_all("Subject")) == 1, what
            summary = printable(words["summary"])   # a long one is cut after a word in the subject, whole in the body
            assert parsed["Subject"] == "[plimsoll] " + subject_text(summary), what
            assert len(parsed["Subject"]) <= 211 and subject_text(summary).rstrip("…") in summary
            assert parsed["Message-ID"] == f"<{'ab' * 16}@fernhill.example>"
            assert parsed["Date"] == "Mon, 16 Nov 2026 09:43:00 +0000"
            body = parsed.get_content()
            assert "\n" not in body.split("\r\n")[0] and body.startswith(printable(words["summary"])), what
            assert not any(ch in body for ch in "\x1b\u2028"), what   # control characters escaped
            anchor = "#incident-" if per == "incident" else "#alert-"
            assert f"report: https://plimsoll.fernhill.example/report.html{anchor}" in body, what
    (_, alarm, reading) = samples("alert")[3]
    body = email.message_from_string(message(box, alarm, variables(alarm, reading, None), "c" * 32, now),
                                     policy=email.policy.default).get_content()
    assert body.startswith("high opened: source sessions\"\\x0a silent: no new file for 47 min (max_silence 30 min)")
    assert re.search(r"^opened\s+2026-11-16 09:42 UTC \(wall clock\)$", body.replace("\r\n", "\n"), re.M)
