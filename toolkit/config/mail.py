"""The mail of ``plimsoll.yml``: the ``smtp`` server and the ``email`` recipients ``plimsoll notify``
sends alert or incident events to, one plain-text message each. The password is never in the file:
``password_env`` names the environment variable that holds it."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

from toolkit.config.fields import Section
from toolkit.config.registry import EMAIL_KEYS, SMTP_KEYS
from toolkit.config.yamlsource import Located
from toolkit.model import Mailbox, Smtp
from toolkit.problems import Problem

# one address, as a person writes it in a mail program's To field: no display name, no list
ADDRESS = re.compile(r"^[^@\s<>(),;:\"\[\]\\]+@[A-Za-z0-9](?:[A-Za-z0-9.-]*[A-Za-z0-9])?$")
DEFAULT_PORTS = {"starttls": 587, "tls": 465, "none": 25}


def load_smtp(doc: Located, raw: Any, root: Path, problems: list[Problem]) -> Smtp | None:
    if raw is None:
        return None
    before = len(problems)
    section = Section(doc, ("smtp",), raw, SMTP_KEYS, problems)
    host, port, security = section.get("host"), section.get("port"), section.get("security")
    sender, user, password_env = section.get("from"), section.get("user"), section.get("password_env")
    timeout, ca_file = section.get("timeout"), section.get("ca_file")
    if host is not None and (not host.strip() or any(c in host for c in " /@\r\n")):
        section.error(("smtp", "host"), f"smtp.host: '{host}' is not a host name or address")
    if sender is not None and not ADDRESS.match(sender):
        section.error(("smtp", "from"), f"smtp.from: '{sender}' is not one mail address (name@example.org)")
    if (user is None) != (password_env is None):
        missing = "password_env" if user is not None else "user"
        section.error(("smtp", missing), f"smtp: user and password_env go together; {missing} is missing")
    if user is not None and security == "none":
        section.error(("smtp", "security"), "smtp.security: none with a user would send the password in clear; "
                                            "use starttls or tls")
    if timeout is not None and timeout.total_seconds() <= 0:
        section.error(("smtp", "timeout"), "smtp.timeout must be longer than 0s")
    ca_path = (root / ca_file) if ca_file is not None else None
    if ca_path is not None and not ca_path.is_file():
        section.error(("smtp", "ca_file"), f"smtp.ca_file: {ca_path} is not a file")
    if len(problems) > before or host is None or sender is None or security is None:
        return None
    return Smtp(host, port or DEFAULT_PORTS[security], security, sender, user, password_env, timeout, ca_path)


def load_mailboxes(doc: Located, raw: list[Any], smtp: Smtp | None, smtp_given: bool, taken: dict[str, str],
                   problems: list[Problem]) -> tuple[Mailbox, ...]:
    """Each entry of ``email``: a unique name (among the webhooks' too: they share the outbox), one or
    more addresses; the ``smtp`` server is required with any."""
    found: list[Mailbox] = []
    if raw and not smtp_given:
        problems.append(Problem(doc.file, doc.line(("email",)), "email: give the mail server under smtp "
                                                                "(host, from, …) to send mail"))
    for index, body in enumerate(raw):
        section = Section(doc, ("email", index), body, EMAIL_KEYS, problems)
        name, to, per, catch_up = section.get("name"), section.get("to"), section.get("per"), section.get("catch_up")
        ok = True
        if name is not None:
            if not name.strip() or not name.isprintable():
                section.error(("email", index, "name"), f"email.{index}.name: write a name without line breaks")
                ok = False
            elif name in taken:
                section.error(("email", index, "name"), f"email.{index}: the name '{name}' is already used by "
                                                        f"{taken[name]}")
                ok = False
            else:
                taken[name] = f"email.{index}"
        if to is not None:
            if not to:
                section.error(("email", index, "to"), f"email.{index}.to: give at least one address")
                ok = False
            for at, address in enumerate(to):
                if not isinstance(address, str) or not ADDRESS.match(address):
                    section.error(("email", index, "to", at),
                                  f"email.{index}.to: '{address}' is not one mail address (name@example.org)")
                    ok = False
        if ok and smtp is not None and None not in (name, to, per, catch_up):
            found.append(Mailbox(name, tuple(to), smtp, catch_up, per))
    return tuple(found)
