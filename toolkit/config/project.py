"""Loading and validating ``plimsoll.yml`` and the check files it points at.

Validation collects every problem it can find before failing, each as ``file:line: message``; a
project that loads is a :class:`~toolkit.model.Project` whose expressions were all parsed, checked
against their source's Parquet schema and bound by DuckDB to the right type. The sections are
validated by the modules beside this one: :mod:`~toolkit.config.sources`,
:mod:`~toolkit.config.checks`, :mod:`~toolkit.config.webhooks`.
"""

from __future__ import annotations

import urllib.parse
from pathlib import Path

import duckdb

from toolkit.config.checks import load_checks
from toolkit.config.fields import Section, size_of
from toolkit.config.mail import load_mailboxes, load_smtp
from toolkit.config.registry import NOTIFY_KEYS, PROJECT_KEYS
from toolkit.config.sources import catalog_settings, engine_settings, load_sources, storage_settings
from toolkit.config.webhooks import load_webhooks
from toolkit.config.yamlsource import load
from toolkit.model import Check, Notify, Project
from toolkit.problems import Problem, ProjectInvalid, display_path


PROJECT_FILE = "plimsoll.yml"


def project_file(path: Path) -> Path:
    """The project file ``-p`` names: the file itself, or ``plimsoll.yml`` in a folder. A file that is
    not there is refused in one line naming the folder searched."""
    if path.is_dir():
        found = path / PROJECT_FILE
        if not found.is_file():
            raise ProjectInvalid([Problem(display_path(path), 0, f"no {PROJECT_FILE} in this folder "
                                          f"({path.resolve()})")])
        return found
    if not path.is_file():
        folder = path.parent.resolve()
        if not folder.is_dir():
            where = f"the folder {folder} does not exist"
        elif path.suffix in (".yml", ".yaml"):
            where = f"no {path.name} in {folder}"
        else:
            where = f"no file or folder {path.name} in {folder}"
        raise ProjectInvalid([Problem(display_path(path), 0, f"project file not found: {where} "
                                      "(-p takes the project file or the folder holding plimsoll.yml)")])
    return path


def load_project(path: Path | str = "plimsoll.yml", check_schema: bool = True) -> Project:
    """Load and validate a project; raise :class:`ProjectInvalid` listing every problem."""
    file = project_file(Path(path))
    shown = display_path(file)
    root = file.resolve().parent
    problems: list[Problem] = []
    doc, found = load(file, shown)
    problems += found
    if doc is None:
        raise ProjectInvalid(problems)
    top = Section(doc, (), doc.data if doc.data is not None else {}, PROJECT_KEYS, problems)
    warehouse, checks_dir = top.get("warehouse"), top.get("checks")
    memory_limit, threads = top.get("memory_limit"), top.get("threads")
    max_read = size_of(top, "max_read_per_run")
    engine = engine_settings(top)
    settings = storage_settings(doc, top.get("storage"), problems)
    catalog = catalog_settings(doc, top.get("iceberg_catalog"), root, problems)
    con = duckdb.connect()
    sources = load_sources(doc, top.get("sources") or {}, root, con, problems, check_schema, engine, settings,
                           catalog)
    checks: dict[str, Check] = {}
    folder = (root / (checks_dir or "checks/")).resolve()
    if checks_dir is not None and not folder.is_dir():
        top.error(("checks",), f"checks folder '{checks_dir}' does not exist")
    elif folder.is_dir():
        checks = load_checks(folder, sources, con, problems)
    con.close()
    report_url = top.get("report_url")
    if report_url is not None:
        parts = urllib.parse.urlsplit(report_url)
        if parts.scheme not in ("http", "https") or not parts.hostname or "@" in parts.netloc:
            top.error(("report_url",), f"report_url: '{report_url}' is not an http:// or https:// URL with a host "
                                       "(and no user name or password)")
            report_url = None
    webhooks = load_webhooks(doc, top.get("webhooks") or [], problems, root, report_url)
    smtp = load_smtp(doc, top.get("smtp"), root, problems)
    taken = {h.name: f"webhooks.{i}" for i, h in enumerate(webhooks)}
    mailboxes = load_mailboxes(doc, top.get("email") or [], smtp, top.get("smtp") is not None, taken, problems)
    notify_s = Section(doc, ("notify",), top.get("notify") or {}, NOTIFY_KEYS, problems)
    notify = Notify(**{k.name: notify_s.get(k.name) for k in NOTIFY_KEYS})
    if notify.max_backoff is not None and notify.backoff is not None and notify.max_backoff < notify.backoff:
        notify_s.error(("notify", "max_backoff"), "notify.max_backoff cannot be shorter than notify.backoff")
    if problems:
        raise ProjectInvalid(problems)
    return Project(
        file=file.resolve(), root=root, warehouse=(root / warehouse).resolve(), checks_dir=folder,
        sources=sources, checks=checks, memory_limit=memory_limit, threads=threads,
        max_read_per_run=max_read, webhooks=webhooks, notify=notify, engine=engine, storage=settings,
        mailboxes=mailboxes, report_url=report_url,
    )
