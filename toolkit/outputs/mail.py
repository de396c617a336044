"""Mail for ``plimsoll notify``: one plain-text message per alert or incident event, sent over SMTP
with Python's smtplib, through the same outbox as the webhooks (queued once, sent until a server
accepts it, retried with the same backoff, at least once).

The message is composed when the event is queued and kept in the outbox, so every attempt sends the
same bytes with the same ``Message-ID`` (made from the event's idempotency key: a mail system that
sees it twice may drop the copy). Its subject and first line are the event's summary, as the
listings say it; below come the figures, each in the measure's unit, and a link to the report. Text
from the data (keys, split values) is written with control characters escaped, so a key holding a
line break cannot add a header or a line. Keys and counts only, never a session or viewer id.

A server's answer decides what becomes of a row: a 4xx reply, a dropped connection, a timeout or a
refused connection are retried; a 5xx reply (a refused sender or recipients, refused credentials)
abandons it at once. A message some recipients accepted is delivered (sending it again would repeat
it to them); the refused ones are named in the row's ``last_error``.
"""

from __future__ import annotations

import email.policy
import email.utils
import os
import smtplib
import socket
import ssl
from datetime import datetime, timezone
from email.message import EmailMessage
from typing import Any

from toolkit.model import Mailbox
from toolkit.outputs.deadline import Deadline
from toolkit.outputs.listings import cause_line, printable
from toolkit.problems import PlimsollError

SUBJECT_LENGTH = 200  # characters of the summary in a subject; the whole line opens the body


def secrets(box: Mailbox) -> dict[str, str]:
    """The server's password read from its environment variable now; never shown anywhere."""
    smtp = box.smtp
    if smtp.password_env is None:
        return {}
    value = os.environ.get(smtp.password_env)
    if not value:
        raise PlimsollError(f"{box.name}: environment variable {smtp.password_env} (smtp.password_env) is not set; "
                            "nothing sent to these recipients")
    return {"password": value}


def message(box: Mailbox, payload: dict[str, Any], words: dict[str, Any], key: str, now: datetime) -> str:
    """The whole message (headers and body) for one event, as the text sent on every attempt."""
    summary = printable(str(words["summary"]))
    mail = EmailMessage(policy=email.policy.SMTP)
    mail["From"] = box.smtp.sender
    mail["To"] = ", ".join(box.to)
    mail["Subject"] = "[plimsoll] " + subject_text(summary)
    mail["Date"] = email.utils.format_datetime(now.replace(tzinfo=timezone.utc))
    domain = box.smtp.sender.rpartition("@")[2]
    mail["Message-ID"] = f"<{key}@{domain}>"
    mail["X-Plimsoll-Event"] = f"{payload.get('event')}"
    mail.set_content(_text(payload, words, summary), subtype="plain", charset="utf-8")
    return mail.as_string()


def subject_text(summary: str) -> str:
    """The summary, cut after its last whole word within ``SUBJECT_LENGTH`` when longer (the body has it
    whole)."""
    if len(summary) <= SUBJECT_LENGTH:
        return summary
    cut = summary[:SUBJECT_LENGTH - 1]
    return (cut.rsplit(" ", 1)[0] if " " in cut else cut).rstrip(";,:") + "…"


def _text(payload: dict[str, Any], words: dict[str, Any], summary: str) -> str:
    lines = [summary, ""]
    if "cause" in payload:
        cause = payload.get("cause") or {}
        causes = [dict(c, significant=True) for c in payload.get("causes") or []]
        where = cause_line(cause.get("key_text"), causes, payload.get("affected_sessions"))
        if where:
            lines += [f"  └ {where}", ""]
        rows = [("incident", payload.get("incident_id")), ("status", payload.get("status")),
                ("severity", payload.get("severity")),
                ("cause", f"{cause.get('check') or '(' + str(cause.get('alarm')) + ')'} {cause.get('key_text') or ''}"),
                ("split", cause.get("split_value")),
                ("worst value", words.get("value_text")), ("threshold", words.get("threshold_text")),
                ("alerts", payload.get("alerts")), ("affected", _count(payload.get("affected_sessions"), "session")),
                ("viewers", _count(payload.get("affected_viewers"), "viewer")),
                ("opened", _time(payload.get("opened_at"))), ("closed", _time(payload.get("closed_at"))),
                ("merged into", payload.get("merged_into"))]
    elif payload.get("alarm"):
        rows = [("source", payload.get("source")), ("alarm", payload.get("alarm")),
                ("severity", payload.get("severity")), ("opened", _time(payload.get("opened_at"), "wall clock")),
                ("closed", _time(payload.get("closed_at"), "wall clock")), ("reason", payload.get("close_reason")),
                ("last file", _time(payload.get("last_file_at"), "wall clock")),
                ("newest data", _time(payload.get("newest_data_at"))), ("alert", payload.get("alert_id"))]
    else:
        causes = [dict(c, significant=True) for c in payload.get("causes") or []]
        where = cause_line(payload.get("key_text"), causes, payload.get("affected_sessions"))
        if where:
            lines += [f"  └ {where}", ""]
        rows = [("check", payload.get("check")), ("key", payload.get("key_text") or "(all sessions)"),
                ("split", payload.get("split_value")), ("severity", payload.get("severity")),
                ("value", words.get("value_text")), ("threshold", words.get("threshold_text")),
                ("affected", _count(payload.get("affected_sessions"), "session")),
                ("viewers", _count(payload.get("affected_viewers"), "viewer")),
                ("excess", _count(payload.get("excess_sessions"), "session")),
                ("breaching windows", payload.get("breach_windows")),
                ("opened", _time(payload.get("opened_at"))), ("closed", _time(payload.get("closed_at"))),
                ("reason", payload.get("close_reason")), ("alert", payload.get("alert_id")),
                ("incident", payload.get("incident_id"))]
    shown = [(name, printable(str(value))) for name, value in rows if value not in (None, "", "-")]
    width = max(len(name) for name, _ in shown) if shown else 0
    lines += [f"{name.ljust(width)}  {value}" for name, value in shown]
    if words.get("link"):
        lines += ["", f"report: {words['link']}"]
    lines += ["", f"Sent by {payload.get('sender')}; times are data time (UTC) unless marked wall clock."]
    return "\n".join(lines) + "\n"


def _count(value: Any, noun: str) -> str | None:
    if value is None:
        return None
    count = round(value)
    return f"{count:,} {noun}{'' if count == 1 else 's'}"


def _time(text: str | None, clock: str = "data time") -> str | None:
    """'2026-11-02T00:49:00Z' as '2026-11-02 00:49 UTC'."""
    if not text:
        return None
    return f"{text[:10]} {text[11:16]} UTC" + (" (wall clock)" if clock == "wall clock" else "")


class _Late(Exception):
    """The deadline passed."""


def send(box: Mailbox, text: str, password: str | None) -> tuple[bool, bool, str | None]:
    """Send one message within the server's timeout: (delivered, worth retrying, error or a note).

    A note on a delivered message names the recipients the server refused."""
    smtp_settings = box.smtp
    seconds = smtp_settings.timeout.total_seconds()
    context = ssl.create_default_context(cafile=str(smtp_settings.ca_file) if smtp_settings.ca_file else None)
    client: smtplib.SMTP | None = None
    deadline = Deadline(seconds)  # the same whole-exchange deadline as a POST's
    where = smtp_settings.endpoint
    try:
        with deadline:
            try:
                # connecting is bounded by the socket's timeout, everything after it by the deadline
                if smtp_settings.security == "tls":
                    client = smtplib.SMTP_SSL(smtp_settings.host, smtp_settings.port, timeout=seconds,
                                              context=context)
                else:
                    client = smtplib.SMTP(smtp_settings.host, smtp_settings.port, timeout=seconds)
                deadline.watch(client.sock)
                client.ehlo()
                if smtp_settings.security == "starttls":
                    client.starttls(context=context)
                    deadline.watch(client.sock)
                    client.ehlo()
                if smtp_settings.user is not None:
                    client.login(smtp_settings.user, password or "")
                refused = client.sendmail(smtp_settings.sender, list(box.to), text.encode("ascii"))
            except Exception:
                if deadline.expired:
                    raise _Late from None
                raise
        _quit(client)
        if refused:
            said = "; ".join(f"{address} ({code} {_reply(reply)})" for address, (code, reply) in sorted(refused.items()))
            return True, False, f"refused by {where}: {said}"
        return True, False, None
    except _Late:
        return False, True, f"no answer within {seconds:g} s from {where}"
    except smtplib.SMTPRecipientsRefused as err:
        codes = [code for code, _ in err.recipients.values()]
        said = "; ".join(f"{address} ({code} {_reply(reply)})" for address, (code, reply) in sorted(err.recipients.items()))
        return False, any(400 <= c < 500 for c in codes), f"{where} refused every recipient: {said}"
    except smtplib.SMTPNotSupportedError:
        return False, False, f"{where} does not offer STARTTLS (smtp.security: starttls); use tls or another server"
    except smtplib.SMTPResponseException as err:
        what = {smtplib.SMTPAuthenticationError: "refused the user and password",
                smtplib.SMTPSenderRefused: "refused the sender", smtplib.SMTPDataError: "refused the message",
                smtplib.SMTPHeloError: "refused the greeting"}.get(type(err), "answered")
        return False, 400 <= err.smtp_code < 500, f"{where} {what}: {err.smtp_code} {_reply(err.smtp_error)}"
    except smtplib.SMTPServerDisconnected as err:
        return False, True, f"{where} closed the connection: {err or 'before answering'}"
    except ssl.SSLError as err:
        return False, True, f"TLS with {where} failed: {err.reason or err}"
    except (ConnectionError, socket.timeout, TimeoutError) as err:
        return False, True, f"cannot reach {where}: {_reason(err)}"
    except (OSError, smtplib.SMTPException) as err:
        return False, True, f"sending to {where} failed: {_reason(err)}"
    finally:
        if client is not None:
            try:
                client.close()
            except OSError:
                pass


def _quit(client: smtplib.SMTP | None) -> None:
    if client is None:
        return
    try:
        client.quit()
    except (smtplib.SMTPException, OSError):
        pass  # the message was accepted; a server that hangs up at QUIT changes nothing


def _reply(reply: bytes | str) -> str:
    text = reply.decode("utf-8", "replace") if isinstance(reply, bytes) else str(reply)
    return printable(" ".join(text.split()))


def _reason(err: BaseException) -> str:
    if isinstance(err, (socket.timeout, TimeoutError)):
        return "timed out"
    return getattr(err, "strerror", None) or str(err) or type(err).__name__
