"""The webhooks of ``plimsoll.yml``: where ``plimsoll notify`` POSTs, with which headers (each value
from an environment variable, never written in the file) and how long it waits."""

from __future__ import annotations

import re
import urllib.parse
from pathlib import Path
from typing import Any

from toolkit.config.bodies import BodyError, check_body, compile_body, is_json_type, is_text_type
from toolkit.config.fields import ENV_NAME, Section
from toolkit.config.registry import WEBHOOK_KEYS
from toolkit.config.yamlsource import Located
from toolkit.model import Webhook, endpoint
from toolkit.problems import Problem


_TOKEN = re.compile(r"^[!#$%&'*+.^_`|~0-9A-Za-z-]+$")  # an HTTP header name (RFC 9110 token)


RESERVED_HEADERS = ("content-type", "content-length", "transfer-encoding", "connection", "host",
                    "idempotency-key", "user-agent")


def load_webhooks(doc: Located, raw: list[Any], problems: list[Problem], root: Path | None = None,
                  report_url: str | None = None) -> tuple[Webhook, ...]:
    """Each webhook: an http(s) URL without credentials, a unique name (default: its scheme://host:port),
    a timeout above zero, headers whose values come from environment variables, and a body template
    that renders every sample event into a body of its content type."""
    found: list[Webhook] = []
    names: dict[str, int] = {}
    for index, body in enumerate(raw):
        section = Section(doc, ("webhooks", index), body, WEBHOOK_KEYS, problems)
        url, name, timeout = section.get("url"), section.get("name"), section.get("timeout")
        catch_up, per = section.get("catch_up"), section.get("per")
        template = _body(section, index, root or Path("."), report_url, per or "alert")
        if url is not None:
            parts = urllib.parse.urlsplit(url)
            if "@" in parts.netloc:  # never repeated in the message: it holds a password
                section.error((*section.path, "url"),
                              f"webhooks.{index}.url: a user name or password in the URL would be stored and shown; "
                              f"pass credentials in a header whose value comes from an environment variable "
                              f"(webhooks.{index}.headers, e.g. Authorization: FERNHILL_HOOK_AUTH)")
                url = None
            elif parts.scheme not in ("http", "https") or not parts.hostname:
                section.error((*section.path, "url"),
                              f"webhooks.{index}.url: '{url}' is not an http:// or https:// URL with a host")
                url = None
        if timeout is not None and timeout.total_seconds() <= 0:
            section.error((*section.path, "timeout"), f"webhooks.{index}.timeout must be longer than 0s")
        headers = _headers(section, index, section.get("headers"))
        name = name or (endpoint(url) if url is not None else None)
        if name is not None and name in names:
            hint = "" if "name" in section.raw else "; give each webhook on this host a name"
            section.error((*section.path, "name" if "name" in section.raw else "url"),
                          f"webhooks.{index}: the name '{name}' is already used by webhooks.{names[name]}{hint}")
        elif name is not None:
            names[name] = index
        if (url is not None and name is not None and timeout is not None and headers is not None
                and catch_up is not None and per is not None):
            if template is not False:
                text, content_type, origin = template if template else (None, "application/json", "")
                found.append(Webhook(name, url, timeout, headers, catch_up, per, text, content_type, origin))
    return tuple(found)


def _body(section: Section, index: int, root: Path, report_url: str | None,
          per: str) -> tuple[str, str, str] | None | bool:
    """The webhook's template (its text, content type and where it is written), None without one,
    False after a problem."""
    text, file, content_type = section.get("body"), section.get("body_file"), section.get("content_type")
    where = f"webhooks.{index}"
    if content_type is not None and not (is_json_type(content_type) or is_text_type(content_type)):
        section.error((*section.path, "content_type"),
                      f"{where}.content_type: '{content_type}' is neither a JSON type (application/json, …+json) "
                      "nor a text/ type")
        return False
    if text is not None and file is not None:
        section.error((*section.path, "body_file"), f"{where}: give body or body_file, not both")
        return False
    if text is None and file is None:
        if "content_type" in section.raw and not is_json_type(content_type or ""):
            section.error((*section.path, "content_type"),
                          f"{where}.content_type: the default body is JSON; give a body template for {content_type}")
            return False
        return None
    key = "body" if text is not None else "body_file"
    line = section.doc.line((*section.path, key))
    origin = f"{section.doc.file}:{line}"
    if file is not None:
        path = root / file
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as err:
            section.error((*section.path, key), f"{where}.body_file: cannot read {path}: "
                                                f"{err.strerror if isinstance(err, OSError) else 'not UTF-8 text'}")
            return False
        origin = str(file)
    try:
        template = compile_body(text, content_type or "application/json")
        problem = check_body(template, content_type or "application/json", per, report_url)
    except BodyError as err:
        problem = str(err)
    if problem is not None:
        section.error((*section.path, key), f"{where}.{key}: {problem}")
        return False
    return text, content_type or "application/json", origin


def _headers(section: "Section", index: int, raw: dict[str, Any] | None) -> tuple[tuple[str, str], ...] | None:
    """``headers``: header name -> name of the environment variable holding its value; None after a problem."""
    if raw is None:
        return ()
    found: list[tuple[str, str]] = []
    seen: set[str] = set()
    ok = True
    for header, variable in raw.items():
        path = (*section.path, "headers", header)
        where = f"webhooks.{index}.headers.{header}"
        if not isinstance(header, str) or not _TOKEN.match(header):
            section.error(path, f"webhooks.{index}.headers: '{header}' is not a header name")
        elif header.lower() in RESERVED_HEADERS:
            section.error(path, f"{where}: plimsoll sets this header itself")
        elif header.lower() in seen:
            section.error(path, f"{where}: this header is given twice")
        elif not isinstance(variable, str) or not ENV_NAME.match(variable):
            # the value is never repeated: it may be the secret itself, pasted by mistake
            section.error(path, f"{where}: write the name of the environment variable that holds the header's "
                                "value (letters, digits and _), never the value itself")
        else:
            seen.add(header.lower())
            found.append((header, variable))
            continue
        ok = False
    return tuple(found) if ok else None
