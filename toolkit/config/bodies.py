"""Message templates: a webhook's ``body`` (Jinja2) rendered from an event into the JSON or text its
receiver expects.

For a JSON ``content_type`` every ``{{ value }}`` is escaped as the inside of a JSON string, so a
key holding quotes, backslashes or a newline stays inside its string; ``{{ value | json }}`` writes a
whole JSON value (a string with its quotes, a number, ``null``, an object) and is not escaped again.
A rendered JSON body must parse, or it is not sent. For a ``text/`` type values are written as they
are. The environment is sandboxed and undefined names are errors, so a misspelt variable is found
when the project is validated: each template is rendered there against sample events whose keys hold
quotes, backslashes, newlines and control characters.

The variables of an event are its default payload's fields (``event``, ``check``, ``key``,
``key_text``, ``split_value``, ``value``, ``threshold``, ``affected_sessions``, …; an incident's
``cause``, ``alerts``, …), and ``summary`` (the event in one line, as the listings say it),
``value_text`` and ``threshold_text`` (in the measure's unit), ``link`` (the alert's or incident's
card in the published report, with ``report_url``; else null) and ``payload`` (the whole default
payload as JSON).
"""

from __future__ import annotations

import json
import math
from typing import Any

from jinja2 import StrictUndefined, TemplateError, Undefined
from jinja2.sandbox import SandboxedEnvironment

from toolkit.words import Reading, event_line, incident_event_line, measure_text


class JsonText(str):
    """Text that is already JSON: written into a JSON body as it is."""


def is_json_type(content_type: str) -> bool:
    """application/json, and any type with a +json suffix (application/problem+json, …)."""
    media = content_type.split(";", 1)[0].strip().lower()
    return media == "application/json" or media.endswith("+json")


def is_text_type(content_type: str) -> bool:
    return content_type.split(";", 1)[0].strip().lower().startswith("text/")


def _json_value(value: Any) -> JsonText:
    if isinstance(value, JsonText):
        return value
    if isinstance(value, Undefined):
        str(value)  # raises: the name is not defined
    return JsonText(json.dumps(_plain(value), ensure_ascii=False, allow_nan=False))


def _plain(value: Any) -> Any:
    """Values JSON can hold: NaN and infinity as null (a strict parser refuses them)."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def _inside_json_string(value: Any) -> Any:
    """What a bare ``{{ value }}`` writes in a JSON template: the inside of a JSON string."""
    if isinstance(value, JsonText):
        return value
    text = "" if value is None else value if isinstance(value, str) else str(_plain(value))
    return json.dumps(text, ensure_ascii=False)[1:-1]


def environment(json_body: bool) -> SandboxedEnvironment:
    env = SandboxedEnvironment(undefined=StrictUndefined, autoescape=False, keep_trailing_newline=True,
                               finalize=_inside_json_string if json_body else None)
    env.filters["json"] = _json_value
    return env


class BodyError(Exception):
    """A template that cannot be compiled or rendered, or whose JSON does not parse."""


def compile_body(text: str, content_type: str):
    """The compiled template; BodyError with the template's line on a syntax error."""
    try:
        return environment(is_json_type(content_type)).from_string(text)
    except TemplateError as err:
        line = getattr(err, "lineno", None)
        raise BodyError(f"template line {line}: {err.message}" if line else str(err)) from None


def render_body(template, content_type: str, variables: dict[str, Any]) -> str:
    """The body for one event; BodyError when it cannot be rendered or a JSON body does not parse."""
    try:
        body = template.render(**variables)
    except TemplateError as err:
        raise BodyError(f"{err}") from None
    except (TypeError, ValueError, ArithmeticError, LookupError) as err:
        raise BodyError(f"{type(err).__name__}: {err}") from None
    if is_json_type(content_type):
        try:
            json.loads(body)
        except json.JSONDecodeError as err:
            raise BodyError(f"the body is not JSON: {err.msg} (line {err.lineno} column {err.colno})") from None
    return body


def variables(payload: dict[str, Any], reading: Reading, report_url: str | None) -> dict[str, Any]:
    """What a template sees for an event: the payload's fields and the words made from them."""
    incident = "cause" in payload
    if incident:
        cause = payload.get("cause") or {}
        summary = incident_event_line(payload, reading, cause.get("peak_value"), cause.get("threshold"))
        value, threshold = cause.get("peak_value"), cause.get("threshold")
        anchor = f"incident-{payload.get('incident_id')}"
    else:
        summary = event_line(payload, reading)
        value, threshold = payload.get("value"), payload.get("threshold")
        anchor = f"alert-{payload.get('alert_id')}"
    # every event to a webhook of alerts has the fields of a check's alert event, null where it has
    # none (a source alarm's split value, say), so one template serves them all
    found = {} if incident else dict.fromkeys(ALERT_FIELDS)
    found.update(payload)
    found.update(
        summary=summary,
        value_text=measure_text(value, reading) if not payload.get("alarm") else None,
        threshold_text=measure_text(threshold, reading) if not payload.get("alarm") else None,
        link=f"{report_url}#{anchor}" if report_url else None,
        payload=JsonText(json.dumps(_plain(payload), ensure_ascii=False, allow_nan=False)),
    )
    return found


ALERT_FIELDS = ("idempotency_key", "event", "occurred_at", "check", "severity", "alert_id", "fingerprint", "key",
                "key_text", "split_value", "opened_at", "closed_at", "close_reason", "value", "threshold",
                "affected_sessions", "affected_viewers", "excess_sessions", "breach_windows", "incident_id",
                "causes", "run_id", "sender", "measure", "unit", "value_text", "threshold_text", "summary",
                "alarm", "source", "duration_seconds", "limit_seconds", "last_file_at", "newest_data_at")


# ── sample events: what validation renders each template with ─────────────────────────────────────

HOSTILE_KEY = {"site": 'kids" , "x": "y', "title_id": "t-1\n}\\ \u2028 \t<b>\x1b[2J"}


def samples(per: str) -> list[tuple[str, dict[str, Any], Reading]]:
    """(what it is, payload, reading) of the events a webhook of ``per`` may be sent, their keys and
    split values hostile, their optional fields null."""
    key_text = ", ".join(f"{k}={v}" for k, v in HOSTILE_KEY.items())
    alert = {
        "idempotency_key": "0" * 32, "event": "opened", "occurred_at": "2026-11-02T00:49:00Z",
        "check": "title_errors", "severity": "high", "alert_id": "a29f1732ffb5887e",
        "fingerprint": "b7fcc9ca8604ba7b", "key": dict(HOSTILE_KEY), "key_text": key_text,
        "split_value": 'E"42\n', "opened_at": "2026-11-02T00:49:00Z", "closed_at": None, "close_reason": None,
        "value": 0.6, "threshold": 0.1, "affected_sessions": 6, "affected_viewers": 4, "excess_sessions": 5.0,
        "breach_windows": 1, "incident_id": None, "causes": [], "run_id": 1, "sender": "plimsoll",
        "measure": "rate", "unit": None,
    }
    if per == "incident":
        incident = {
            "idempotency_key": "0" * 32, "event": "opened", "occurred_at": "2026-11-16T15:00:00Z",
            "incident_id": "3f0c9a51d27be604", "status": "open", "opened_at": "2026-11-16T15:00:00Z",
            "closed_at": None, "merged_into": None,
            "cause": {"check": "site_errors", "key": dict(HOSTILE_KEY), "key_text": key_text, "split_value": None,
                      "alert_id": "6267dd3fa58ff42b", "alarm": None, "peak_value": 0.31, "threshold": 0.02},
            "alert_ids": ["6267dd3fa58ff42b"], "alerts": 1, "severity": "high", "affected_sessions": 81,
            "affected_viewers": None, "causes": [], "run_id": 12, "sender": "plimsoll",
        }
        merged = dict(incident, event="closed", status="merged", merged_into='9"\n', closed_at="2026-11-16T16:00:00Z")
        return [("an incident's opening", incident, Reading("rate")),
                ("an incident merged into another", merged, Reading("rate"))]
    closed = dict(alert, event="closed", value=None, threshold=None, affected_viewers=None, excess_sessions=None,
                  split_value=None, close_reason="expired", closed_at="2026-11-03T00:00:00Z", key={}, key_text="")
    quantile = dict(alert, value=3226.1180000000004, threshold=2100.0, measure="quantile", unit='m"s',
                    excess_sessions=None)
    alarm = {
        "idempotency_key": "0" * 32, "event": "opened", "occurred_at": "2026-11-16T09:42:00Z", "check": None,
        "alarm": "silent", "source": 'sessions"\n', "severity": "high", "alert_id": "9b1d2f3e4a5c6d7e",
        "fingerprint": "5e6f7a8b9c0d1e2f", "key": {"source": 'sessions"\n'}, "key_text": 'source=sessions"\n',
        "opened_at": "2026-11-16T09:42:00Z", "closed_at": None, "close_reason": None, "duration_seconds": 2820,
        "limit_seconds": 1800, "last_file_at": None, "newest_data_at": None, "incident_id": None, "run_id": 812,
        "sender": "plimsoll",
    }
    return [("an alert's opening", alert, Reading("rate")),
            ("an expiry without a value", closed, Reading("rate")),
            ("a quantile alert with a unit", quantile, Reading("quantile", 'm"s')),
            ("a source alarm", alarm, Reading())]


def check_body(template, content_type: str, per: str, report_url: str | None) -> str | None:
    """The first problem rendering the sample events shows, or None."""
    for what, payload, reading in samples(per):
        try:
            render_body(template, content_type, variables(payload, reading, report_url))
        except BodyError as err:
            return f"rendered for {what} (its key holding quotes and a newline): {err}"
    return None
