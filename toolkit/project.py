"""Loading and validating ``plimsoll.yml`` and the check files it points at.

Validation collects every problem it can find before failing, each as ``file:line: message``; a
project that loads is a :class:`~toolkit.model.Project` whose expressions were all parsed, checked
against their source's Parquet schema and bound by DuckDB to the right type.
"""

from __future__ import annotations

import difflib
import importlib.util
import re
import urllib.parse
from datetime import timedelta
from pathlib import Path
from typing import Any

import duckdb

from . import lake, storage
from .expressions import ExpressionError, parse_expression, unknown_column
from .model import (Baseline, Check, Engine, Expr, Guard, Lifecycle, Measure, Notify, Project, Source, Storage, Webhook,
                    Window, endpoint)
from .problems import Problem, ProjectInvalid, display_path, engine_message
from .sqltext import quote_ident
from .registry import BASELINES, DIRECTIONS, MEASURES, SEVERITIES, Key
from .yamlsource import KeyPath, Located, dotted, load

ENGINES = ("duckdb", "spark")
_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$")
_UNITS = {"B": 1, "KB": 10**3, "MB": 10**6, "GB": 10**9, "TB": 10**12,
          "KiB": 2**10, "MiB": 2**20, "GiB": 2**30, "TiB": 2**40}
PROJECT_KEYS = (
    Key("warehouse", "text", "the DuckDB file holding windows, alerts, runs and state", True),
    Key("checks", "text", "folder of check files (*.yml)", False, "checks/"),
    Key("sources", "mapping", "named session tables in the lake", True),
    Key("memory_limit", "text", "DuckDB memory limit for runs (default 1600MB); beyond it DuckDB spills to disk"),
    Key("threads", "int", "DuckDB threads for runs (default: all cores)", minimum=1),
    Key("max_read_per_run", "text", "the most Parquet (by file size) one run reads per check, e.g. 4GB "
        "(the default); a longer backlog is read by several runs in turn, each committed"),
    Key("webhooks", "list", "endpoints that `plimsoll notify` POSTs alert events to"),
    Key("notify", "mapping", "which alert events `plimsoll notify` sends and how it retries"),
    Key("engine", "choice", "where the stages that touch every session run: duckdb or spark", False,
        "duckdb", ENGINES),
    Key("spark_master", "text", "engine spark: the Spark master URL, e.g. local[2] or spark://host:7077 "
        "(default local[*])"),
    Key("spark_conf", "mapping", "engine spark: Spark settings for the session, e.g. spark.executor.memory: 4g"),
    Key("storage", "mapping", "how s3:// sources are reached: endpoint, region, credentials"),
)
WEBHOOK_KEYS = (
    Key("url", "text", "http:// or https:// URL that receives a JSON POST per alert event", True),
    Key("name", "text", "the webhook's identity in the outbox and in idempotency keys "
        "(default: the url's scheme://host:port)"),
    Key("timeout", "duration", "how long one POST may take, from connecting to the last byte of the answer",
        False, "10s"),
    Key("catch_up", "duration", "on the webhook's first notify, events older than this (in data time, before the "
        "newest data read) are skipped instead of sent, except the opening of an alert still open", False, "1d"),
    Key("headers", "mapping", "headers sent with every POST, each mapped to the NAME of the environment variable "
        "holding its value (e.g. Authorization: FERNHILL_HOOK_AUTH)"),
)
NOTIFY_KEYS = (
    Key("growth", "number", "send an 'updated' event once affected_sessions grew by this share over the last "
        "one sent for the alert (0: every update)", False, 0.5, minimum=0),
    Key("max_attempts", "int", "failed attempts before a delivery is abandoned", False, 8, minimum=1),
    Key("backoff", "duration", "wait after the first failed attempt; doubled after each further one", False, "30s"),
    Key("max_backoff", "duration", "the longest wait between two attempts", False, "1h"),
)
STORAGE_KEYS = (
    Key("endpoint_url", "text", "the S3 endpoint, e.g. http://127.0.0.1:9000 (default: AWS_ENDPOINT_URL, else AWS)"),
    Key("region", "text", "the bucket's region (default: AWS_DEFAULT_REGION)"),
    Key("profile", "text", "a named profile of the AWS shared config and credentials files"),
    Key("access_key_env", "envvar", "name of the environment variable holding the access key id (default: AWS_ACCESS_KEY_ID)"),
    Key("secret_key_env", "envvar", "name of the environment variable holding the secret key (default: AWS_SECRET_ACCESS_KEY)"),
    Key("session_token_env", "envvar", "name of the environment variable holding a session token (default: AWS_SESSION_TOKEN)"),
    Key("anonymous", "bool", "unsigned requests, for public buckets", False, False),
    Key("addressing_style", "choice", "auto, path (most self-hosted S3 servers) or virtual", False, "auto",
        ("auto", "path", "virtual")),
)
SOURCE_KEYS = (
    Key("path", "text", "folder, glob or file of Parquet, or an s3:// URL of them; hive partitions are read", True),
    Key("session_id", "column", "unique per session: duplicates are counted once", True),
    Key("event_time", "expr", "the data time that orders sessions and closes windows: a timestamp column, "
        "or an expression giving one (e.g. epoch_ms(ended_ms), ended_iso::TIMESTAMP)", True),
    Key("exclude", "expr", "SQL boolean: matching sessions never count (crawlers, tests)"),
    Key("max_future", "duration", "a session ending more than this after its file was written has an "
        "impossible event time: it is counted as invalid and never moves the watermark", False, "1d"),
    Key("dedup_horizon", "duration", "how far behind the newest data read (in data time) session ids are "
        "remembered to find repeats; an older session arriving later is counted as late and left out",
        False, "3d"),
)
CHECK_KEYS = (
    Key("check", "name", "unique check name, [a-z][a-z0-9_]*", True),
    Key("about", "text", "one sentence on what the check finds", False, ""),
    Key("source", "text", "a source named in plimsoll.yml", True),
    Key("where", "expr", "SQL boolean: only these sessions enter the check"),
    Key("by", "columns", "the series key: zero or more source columns", False, []),
    Key("measure", "mapping", "what each window's value is", True),
    Key("direction", "choice", "up: alert when higher than the threshold; down: when lower", False, "up", DIRECTIONS),
    Key("window", "mapping", "how sessions are grouped into windows", True),
    Key("baseline", "mapping", "how each window's threshold is derived from history", True),
    Key("guard", "mapping", "windows too small never breach"),
    Key("lifecycle", "mapping", "when an open alert closes"),
    Key("severity", "choice", "carried on alerts", False, "medium", SEVERITIES),
)
MEASURE_KEYS = (Key("kind", "choice", "rate | ratio | quantile", True, choices=tuple(MEASURES)),)
WINDOW_KEYS = (
    Key("sessions", "int", "count window: every N sessions of one series", minimum=1),
    Key("max_wait", "duration", "count window: a partial window older than this closes as it is"),
    Key("every", "duration", "time window: its length, aligned to the epoch"),
    Key("lateness", "duration", "time window: how long after its end a window waits for late sessions", False, "0s"),
)
BASELINE_KEYS = (Key("method", "choice", "how the threshold is derived", True, choices=tuple(BASELINES)),)
GUARD_KEYS = (
    Key("min_sessions", "int", "windows with fewer sessions never breach", False, 1, minimum=0),
    Key("min_bad", "int", "rate: windows with fewer bad sessions never breach", False, 0, minimum=0),
)
LIFECYCLE_KEYS = (
    Key("recover_after", "int", "this many healthy windows in a row close an open alert", False, 2, minimum=1),
    Key("expire_after", "duration", "no window at all for this long closes an open alert", False, "7d"),
)

_NAME = re.compile(r"^[a-z][a-z0-9_]*$")
_PLAIN_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_ENV_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_DURATION = re.compile(r"^(?:(\d+)w)?(?:(\d+)d)?(?:(\d+)h)?(?:(\d+)m)?(?:(\d+)s)?$")
_NUMERIC = re.compile(
    r"^(TINYINT|SMALLINT|INTEGER|BIGINT|HUGEINT|UTINYINT|USMALLINT|UINTEGER|UBIGINT|UHUGEINT|FLOAT|"
    r"DOUBLE|DECIMAL(\(\d+,\s*\d+\))?)$"
)
# every timestamp type Parquet writers produce, as DuckDB names them (with and without a time zone)
_TIMES = re.compile(r"^(TIMESTAMP(_S|_MS|_NS)?|TIMESTAMPTZ(_NS)?|TIMESTAMP(_NS)? WITH TIME ZONE|DATE)$")


def parse_duration(text: Any) -> timedelta:
    """``90m``, ``2h``, ``3d``, ``1w``, ``1h30m``: a whole number of seconds or more."""
    match = _DURATION.match(str(text).strip()) if isinstance(text, (str, int)) else None
    if not match or not str(text).strip() or not any(match.groups()):
        raise ValueError(f"bad duration {text!r}: write a number and a unit, e.g. 90m, 2h, 3d, 1w")
    weeks, days, hours, minutes, seconds = (int(g or 0) for g in match.groups())
    return timedelta(weeks=weeks, days=days, hours=hours, minutes=minutes, seconds=seconds)


class _Section:
    """Validation of one YAML mapping against its key table, collecting problems with lines."""

    def __init__(self, doc: Located, path: KeyPath, value: Any, keys: tuple[Key, ...], problems: list[Problem]):
        self.doc, self.path, self.keys, self.problems = doc, path, {k.name: k for k in keys}, problems
        self.values: dict[str, Any] = {}
        if not isinstance(value, dict):
            self.error(path, f"'{dotted(path) or 'file'}' must be a mapping of keys, not {_kind(value)}")
            value = {}
        self.raw = value
        for name in value:
            if name not in self.keys:
                self.unknown(name)

    def unknown(self, name: str) -> None:
        close = difflib.get_close_matches(name, list(self.keys), n=1, cutoff=0.6)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        where = f" in {dotted(self.path)}" if self.path else ""
        self.error((*self.path, name), f"unknown key '{name}'{where}{hint}")

    def error(self, path: KeyPath, message: str) -> None:
        self.problems.append(Problem(self.doc.file, self.doc.line(path), message))

    def get(self, name: str) -> Any:
        """The typed value of ``name``, its default, or None after recording a problem."""
        key = self.keys[name]
        path = (*self.path, name)
        if name not in self.raw or self.raw[name] is None:
            if key.required:
                where = f" in {dotted(self.path)}" if self.path else ""
                self.error(self.path, f"missing key '{name}'{where}")
                return None
            return _typed(key, key.default) if key.default is not None else None
        try:
            return _typed(key, self.raw[name])
        except ValueError as err:
            self.error(path, f"{dotted(path)}: {err}")
            return None


def _kind(value: Any) -> str:
    return {dict: "a mapping", list: "a list", str: "text", bool: "true/false", int: "a number",
            float: "a number"}.get(type(value), type(value).__name__)


def _typed(key: Key, value: Any) -> Any:
    t = key.type
    if t == "bool":
        if not isinstance(value, bool):
            raise ValueError(f"expected true or false, got {_kind(value)} {value!r}")
        return value
    if t in ("text", "name", "column", "expr", "choice", "envvar"):
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise ValueError(f"expected text, got {_kind(value)}")
        value = str(value)
        if t == "envvar" and not _ENV_NAME.match(value):
            raise ValueError(f"'{value}' is not an environment variable name: write the variable's name, "
                             "not its value")
        if t == "name" and not _NAME.match(value):
            raise ValueError(f"'{value}' is not a valid name: use [a-z][a-z0-9_]*")
        if t == "choice" and value not in key.choices:
            close = difflib.get_close_matches(value, key.choices, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ValueError(f"'{value}' is not one of {', '.join(key.choices)}{hint}")
        return value
    if t == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"expected a whole number, got {_kind(value)} {value!r}")
        if key.minimum is not None and value < key.minimum:
            raise ValueError(f"must be at least {int(key.minimum)}, got {value}")
        return value
    if t in ("number", "fraction"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ValueError(f"expected a number, got {_kind(value)} {value!r}")
        value = float(value)
        if t == "fraction" and not 0 < value < 1:
            raise ValueError(f"must be between 0 and 1 (exclusive), got {value}")
        if key.minimum is not None and value < key.minimum:
            raise ValueError(f"must be at least {key.minimum}, got {value}")
        return value
    if t == "duration":
        return parse_duration(value)
    if t == "columns":
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise ValueError("expected a list of column names")
        if len(set(value)) != len(value):
            raise ValueError("a column is listed twice")
        return list(value)
    if t == "mapping":
        if not isinstance(value, dict):
            raise ValueError(f"expected a mapping of keys, got {_kind(value)}")
        return value
    if t == "list":
        if not isinstance(value, list):
            raise ValueError(f"expected a list, got {_kind(value)}")
        return value
    raise AssertionError(f"unknown key type {t}")


class _Binder:
    """Checks expressions and columns against a source's schema, using DuckDB to bind types."""

    def __init__(self, con: duckdb.DuckDBPyConnection, source: Source):
        self.con, self.source = con, source
        self.table = lake.schema_table(con, source.name, source.columns) if source.columns else None

    def column(self, section: _Section, name: str | None, key: str) -> str | None:
        if name is None or not self.source.columns:
            return name
        if name not in self.source.columns:
            section.error((*section.path, key), f"{dotted((*section.path, key))}: "
                          f"{unknown_column(name, self.source.columns)} in source '{self.source.name}'")
            return None
        return name

    def expr(self, section: _Section, text: str | None, key: str, want: str) -> Expr | None:
        if text is None:
            return None
        path = (*section.path, key)
        try:
            parsed = parse_expression(text, self.source.columns or None)
        except ExpressionError as err:
            section.error(path, f"{dotted(path)}: {err}")
            return None
        if self.source.engine.name == "spark":
            from .spark_sql import TranslationError, spark_expression

            try:
                spark_expression(parsed.sql)
            except TranslationError as err:
                section.error(path, f"{dotted(path)}: cannot run on engine spark: {err}")
                return None
        if self.table is None:
            return parsed
        try:
            row = self.con.execute(f"DESCRIBE SELECT {parsed.sql} AS v FROM {self.table}").fetchone()
        except duckdb.Error as err:
            first = str(err).strip().splitlines()[0]
            section.error(path, f"{dotted(path)}: DuckDB cannot use this expression: {first}")
            return None
        kind = str(row[1]) if row else "?"
        if want == "boolean" and kind != "BOOLEAN":
            section.error(path, f"{dotted(path)}: must be true/false per session, but is {kind}")
            return None
        if want == "number" and not _NUMERIC.match(kind):
            section.error(path, f"{dotted(path)}: must be a number per session, but is {kind}")
            return None
        if want == "time" and not _TIMES.match(kind):
            section.error(path, f"{dotted(path)}: must give a timestamp per session, but is {kind}; "
                          "turn epoch numbers or text into one, e.g. epoch_ms(ended_ms) or ended_iso::TIMESTAMP")
            return None
        return parsed

    def time(self, section: _Section, text: str | None) -> Expr | None:
        """The event time: a timestamp column as it is, or an expression giving a timestamp."""
        if text is None:
            return None
        if text in self.source.columns or (not self.source.columns and _PLAIN_NAME.match(text)):
            kind = self.source.columns.get(text)
            if kind is not None and not _TIMES.match(kind):
                section.error((*section.path, "event_time"),
                              f"{dotted((*section.path, 'event_time'))}: column '{text}' is {kind}, not a "
                              "timestamp; give an expression that makes one, e.g. epoch_ms(" + text + ")")
                return None
            return Expr(text=text, sql=quote_ident(text), columns=(text,))
        return self.expr(section, text, "event_time", "time")


def load_project(path: Path | str = "plimsoll.yml", check_schema: bool = True) -> Project:
    """Load and validate a project; raise :class:`ProjectInvalid` listing every problem."""
    file = Path(path)
    shown = display_path(file)
    if not file.is_file():
        raise ProjectInvalid([Problem(shown, 0, "project file not found")])
    root = file.resolve().parent
    problems: list[Problem] = []
    doc, found = load(file, shown)
    problems += found
    if doc is None:
        raise ProjectInvalid(problems)
    top = _Section(doc, (), doc.data if doc.data is not None else {}, PROJECT_KEYS, problems)
    warehouse, checks_dir = top.get("warehouse"), top.get("checks")
    memory_limit, threads = top.get("memory_limit"), top.get("threads")
    max_read = _size(top, "max_read_per_run")
    engine = _engine(top)
    settings = _storage(doc, top.get("storage"), problems)
    con = duckdb.connect()
    sources = _load_sources(doc, top.get("sources") or {}, root, con, problems, check_schema, engine, settings)
    checks: dict[str, Check] = {}
    folder = (root / (checks_dir or "checks/")).resolve()
    if checks_dir is not None and not folder.is_dir():
        top.error(("checks",), f"checks folder '{checks_dir}' does not exist")
    elif folder.is_dir():
        checks = _load_checks(folder, sources, con, problems)
    con.close()
    webhooks = _webhooks(doc, top.get("webhooks") or [], problems)
    notify_s = _Section(doc, ("notify",), top.get("notify") or {}, NOTIFY_KEYS, problems)
    notify = Notify(**{k.name: notify_s.get(k.name) for k in NOTIFY_KEYS})
    if notify.max_backoff is not None and notify.backoff is not None and notify.max_backoff < notify.backoff:
        notify_s.error(("notify", "max_backoff"), "notify.max_backoff cannot be shorter than notify.backoff")
    if problems:
        raise ProjectInvalid(problems)
    return Project(
        file=file.resolve(), root=root, warehouse=(root / warehouse).resolve(), checks_dir=folder,
        sources=sources, checks=checks, memory_limit=memory_limit, threads=threads,
        max_read_per_run=max_read, webhooks=webhooks, notify=notify, engine=engine, storage=settings,
    )


_TOKEN = re.compile(r"^[!#$%&'*+.^_`|~0-9A-Za-z-]+$")  # an HTTP header name (RFC 9110 token)
RESERVED_HEADERS = ("content-type", "content-length", "transfer-encoding", "connection", "host",
                    "idempotency-key", "user-agent")


def _webhooks(doc: Located, raw: list[Any], problems: list[Problem]) -> tuple[Webhook, ...]:
    """Each webhook: an http(s) URL without credentials, a unique name (default: its scheme://host:port),
    a timeout above zero, headers whose values come from environment variables."""
    found: list[Webhook] = []
    names: dict[str, int] = {}
    for index, body in enumerate(raw):
        section = _Section(doc, ("webhooks", index), body, WEBHOOK_KEYS, problems)
        url, name, timeout = section.get("url"), section.get("name"), section.get("timeout")
        catch_up = section.get("catch_up")
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
        if url is not None and name is not None and timeout is not None and headers is not None and catch_up is not None:
            found.append(Webhook(name, url, timeout, headers, catch_up))
    return tuple(found)


def _headers(section: "_Section", index: int, raw: dict[str, Any] | None) -> tuple[tuple[str, str], ...] | None:
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
        elif not isinstance(variable, str) or not _ENV_NAME.match(variable):
            # the value is never repeated: it may be the secret itself, pasted by mistake
            section.error(path, f"{where}: write the name of the environment variable that holds the header's "
                                "value (letters, digits and _), never the value itself")
        else:
            seen.add(header.lower())
            found.append((header, variable))
            continue
        ok = False
    return tuple(found) if ok else None


def validate_check(project: Project, doc: Located) -> tuple[Check | None, list[Problem]]:
    """One check document validated against the project's sources exactly as a check file is.

    For a check file's mapping changed in memory (a backtest's overrides): the same rules, the same
    messages, and the problems returned rather than raised so the caller can say where they came from.
    """
    problems: list[Problem] = []
    con = duckdb.connect()
    try:
        check = _load_check(doc, project.sources, con, problems)
    finally:
        con.close()
    return check, problems


def _size(top: "_Section", name: str) -> int | None:
    """A size such as 4GB or 512MiB, in bytes."""
    text = top.get(name)
    if text is None:
        return None
    match = _SIZE.match(str(text))
    if not match or float(match.group(1)) <= 0:
        top.error((name,), f"{name} '{text}': expected a size such as 4GB or 512MiB")
        return None
    return int(float(match.group(1)) * _UNITS[match.group(2)])


def _engine(top: _Section) -> Engine:
    """The ``engine`` keys: Spark settings only with ``engine: spark``, and pyspark installed for it."""
    name, master, conf = top.get("engine") or "duckdb", top.get("spark_master"), top.get("spark_conf")
    if name != "spark":
        for key in ("spark_master", "spark_conf"):
            if key in top.raw:
                top.error((key,), f"{key} applies to engine: spark (this project's engine is {name})")
        return Engine(name)
    if importlib.util.find_spec("pyspark") is None:
        top.error(("engine",), "engine: spark needs pyspark, which is not installed: "
                  "pip install 'plimsoll[spark]' (Java 17 or later must be on the machine)")
    settings: list[tuple[str, str]] = []
    for key, value in (conf or {}).items():
        if not str(key).startswith("spark."):
            top.error(("spark_conf", key), f"spark_conf.{key}: Spark settings start with 'spark.'")
        elif isinstance(value, (dict, list)) or value is None:
            top.error(("spark_conf", key), f"spark_conf.{key}: expected one value, got {_kind(value)}")
        else:
            settings.append((str(key), str(value).lower() if isinstance(value, bool) else str(value)))
    return Engine(name, master, tuple(settings))


def _storage(doc: Located, raw: Any, problems: list[Problem]) -> Storage | None:
    """The ``storage`` mapping; credentials only as names of environment variables."""
    if raw is None:
        return None
    section = _Section(doc, ("storage",), raw, STORAGE_KEYS, problems)
    values = {key.name: section.get(key.name) for key in STORAGE_KEYS}
    if bool(values["access_key_env"]) != bool(values["secret_key_env"]):
        given = "access_key_env" if values["access_key_env"] else "secret_key_env"
        section.error(("storage", given), "storage: access_key_env and secret_key_env go together; give both")
    return Storage(**{k: v for k, v in values.items() if v is not None})


def _remote_files(section: _Section, name: str, where: str, settings: Storage | None,
                  con: duckdb.DuckDBPyConnection) -> list[str] | None:
    """The source's object URLs, with the filesystem registered on ``con``; None after a problem."""
    if not storage.available():
        section.error((*section.path, "path"), f"source '{name}': {storage.INSTALL_HINT}")
        return None
    for variable in storage.missing_variables(settings):
        key = next(k for k in ("access_key_env", "secret_key_env", "session_token_env")
                   if getattr(settings, k) == variable)
        section.error(("storage", key), f"storage.{key}: environment variable {variable} is not set")
        return None
    try:
        storage.register(con, settings)
        return [f.path for f in lake.list_files(where, settings)]
    except storage.StorageError as err:
        section.error((*section.path, "path"), f"source '{name}': {where}: {err}")
        return None


def _load_sources(doc: Located, raw: dict[str, Any], root: Path, con: duckdb.DuckDBPyConnection,
                  problems: list[Problem], check_schema: bool, engine: Engine,
                  settings: Storage | None) -> dict[str, Source]:
    sources: dict[str, Source] = {}
    if not raw:
        problems.append(Problem(doc.file, doc.line(("sources",)), "at least one source is needed"))
    for name, body in raw.items():
        section = _Section(doc, ("sources", name), body, SOURCE_KEYS, problems)
        if not _NAME.match(name):
            section.error(section.path, f"source name '{name}' is not valid: use [a-z][a-z0-9_]*")
        where = section.get("path")
        session_id, event_time, exclude = section.get("session_id"), section.get("event_time"), section.get("exclude")
        limits = {"max_future": section.get("max_future"), "dedup_horizon": section.get("dedup_horizon")}
        limits = {k: v for k, v in limits.items() if v is not None}
        if where is None:
            continue
        location = where if "://" in where else str((root / where))
        remote = storage.is_remote(location)
        if "://" in where and not remote:
            section.error((*section.path, "path"), f"source '{name}': only local paths and s3:// URLs "
                          f"can be read, not {where.split('://')[0]}://")
            sources[name] = Source(name, location, session_id or "", event_time or "", None, {})
            continue
        common = {"engine": engine, "storage": settings if remote else None, "base": lake.base_of(location),
                  **limits}
        columns: dict[str, str] = {}
        if check_schema:
            files = (_remote_files(section, name, location, settings, con) if remote
                     else [f.path for f in lake.list_files(location)])
            unreadable = None
            if files == []:
                unreadable = f"source '{name}': no Parquet files at '{where}'"
            elif files is not None:
                try:
                    columns = _readable_schema(con, files, settings if remote else None)
                except duckdb.Error as err:
                    unreadable = f"source '{name}': cannot read Parquet schema: {engine_message(err)}"
            if unreadable:
                section.error((*section.path, "path"), unreadable)
            if files is None or unreadable:
                # keep the source, without columns, so its checks report only their own problems
                sources[name] = Source(name, location, session_id or "", event_time or "", None, {}, **common)
                continue
        reserved = sorted(c for c in columns if c.startswith("__"))
        if reserved:
            section.error((*section.path, "path"), f"source '{name}': column names starting with '__' are "
                          f"reserved for Plimsoll's own columns: {', '.join(reserved)}")
        source = Source(name, location, session_id or "", event_time or "", None, columns, **common)
        binder = _Binder(con, source)
        if check_schema:
            binder.column(section, session_id, "session_id")
        time = binder.time(section, event_time)
        excl = binder.expr(section, exclude, "exclude", "boolean")
        sources[name] = Source(name, location, session_id or "", event_time or "", excl, columns, time=time,
                               **common)
    return sources


def _readable_schema(con: duckdb.DuckDBPyConnection, files: list[str], settings: Storage | None) -> dict[str, str]:
    """The columns of the source's files, as most of them have them.

    A broken file in the lake, or one whose column has another kind of type than in the other
    files, is a data problem of the run that would read it (exit 1, the file and column named),
    not a reason to call the project invalid: such files are left out here.
    """
    footers = lake.readable_footers(files, settings)
    if not footers:
        return lake.read_schema(con, files)  # none readable: DuckDB's own message says why
    agreeing = lake.agreeing_files(footers)
    return lake.read_schema(con, agreeing)


def _load_checks(folder: Path, sources: dict[str, Source], con: duckdb.DuckDBPyConnection,
                 problems: list[Problem]) -> dict[str, Check]:
    checks: dict[str, Check] = {}
    first_seen: dict[str, str] = {}
    for file in sorted([*folder.glob("*.yml"), *folder.glob("*.yaml")]):
        shown = display_path(file)
        doc, found = load(file, shown)
        problems += found
        if doc is None:
            continue
        check = _load_check(doc, sources, con, problems)
        if check is None:
            continue
        if check.name in checks:
            problems.append(Problem(shown, doc.line(("check",)),
                                    f"duplicate check name '{check.name}' (also in {first_seen[check.name]})"))
            continue
        checks[check.name] = check
        first_seen[check.name] = f"{shown}:{check.line}"
    return checks


def _load_check(doc: Located, sources: dict[str, Source], con: duckdb.DuckDBPyConnection,
                problems: list[Problem]) -> Check | None:
    before = len(problems)
    top = _Section(doc, (), doc.data if doc.data is not None else {}, CHECK_KEYS, problems)
    name, source_name = top.get("check"), top.get("source")
    about, direction, severity = top.get("about"), top.get("direction"), top.get("severity")
    source = sources.get(source_name) if source_name else None
    if source_name is not None and source is None:
        close = difflib.get_close_matches(source_name, list(sources), n=1)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        top.error(("source",), f"unknown source '{source_name}'{hint}")
    binder = _Binder(con, source) if source is not None else None
    where = binder.expr(top, top.get("where"), "where", "boolean") if binder else None
    by = top.get("by") or []
    if binder and source.columns:
        for index, column in enumerate(by):
            if column not in source.columns:
                top.error(("by", index), f"by: {unknown_column(column, source.columns)} in source '{source.name}'")
    measure = _measure(doc, top.get("measure"), binder, problems)
    window = _window(doc, top.get("window"), problems)
    baseline = _baseline(doc, top.get("baseline"), measure, problems)
    guard_s = _Section(doc, ("guard",), top.get("guard") or {}, GUARD_KEYS, problems)
    guard = Guard(guard_s.get("min_sessions"), guard_s.get("min_bad"))
    if measure is not None and measure.kind != "rate" and "min_bad" in guard_s.raw:
        guard_s.error(("guard", "min_bad"), f"guard.min_bad applies to rate measures, not {measure.kind}")
    life_s = _Section(doc, ("lifecycle",), top.get("lifecycle") or {}, LIFECYCLE_KEYS, problems)
    lifecycle = Lifecycle(life_s.get("recover_after"), life_s.get("expire_after"))
    if measure is not None and measure.split and set(by) & {measure.split}:
        top.error(("measure", "split"), f"measure.split: '{measure.split}' is already in 'by'")
    if len(problems) > before or None in (name, source, measure, window, baseline):
        return None
    return Check(
        name=name, about=about, source=source, where=where, by=tuple(by), measure=measure,
        direction=direction, window=window, baseline=baseline, guard=guard,
        lifecycle=lifecycle, severity=severity, file=doc.file, line=doc.line(("check",)),
    )


def _measure(doc: Located, raw: Any, binder: _Binder | None, problems: list[Problem]) -> Measure | None:
    if raw is None:
        return None
    kind_name = raw.get("kind") if isinstance(raw, dict) else None
    kind = MEASURES.get(kind_name) if isinstance(kind_name, str) else None
    section = _Section(doc, ("measure",), raw, MEASURE_KEYS + (kind.keys if kind else ()), problems)
    if section.get("kind") is None or kind is None:
        return None
    values: dict[str, Any] = {"kind": kind.name}
    for key in kind.keys:
        value = section.get(key.name)
        if binder is None:
            continue
        if key.type == "expr":
            want = "boolean" if key.name == "bad" else "number"
            value = binder.expr(section, value, key.name, want)
        elif key.type == "column":
            value = binder.column(section, value, key.name)
        values[key.name] = value
    if any(values.get(k.name) is None for k in kind.keys if k.required):
        return None
    return Measure(**values)


def _window(doc: Located, raw: Any, problems: list[Problem]) -> Window | None:
    if raw is None:
        return None
    section = _Section(doc, ("window",), raw, WINDOW_KEYS, problems)
    given = set(section.raw)
    if "sessions" in given and "every" in given:
        section.error(("window", "every"), "window: give either 'sessions' (count window) or 'every' (time window), not both")
        return None
    if "sessions" in given:
        if "lateness" in given:
            section.error(("window", "lateness"), "window.lateness applies to time windows ('every'), not count windows")
        sessions, max_wait = section.get("sessions"), section.get("max_wait")
        if "max_wait" not in given:
            section.error(("window",), "missing key 'max_wait' in window: a count window needs it so quiet series still close")
        return Window(sessions=sessions, max_wait=max_wait) if sessions and max_wait else None
    if "every" in given:
        if "max_wait" in given:
            section.error(("window", "max_wait"), "window.max_wait applies to count windows ('sessions'), not time windows")
        every, lateness = section.get("every"), section.get("lateness")
        if every is not None and every.total_seconds() <= 0:
            section.error(("window", "every"), "window.every must be longer than 0s")
            return None
        return Window(every=every, lateness=lateness) if every and lateness is not None else None
    section.error(("window",), "window needs 'sessions' (count window) or 'every' (time window)")
    return None


def _baseline(doc: Located, raw: Any, measure: Measure | None, problems: list[Problem]) -> Baseline | None:
    if raw is None:
        return None
    method_name = raw.get("method") if isinstance(raw, dict) else None
    method = BASELINES.get(method_name) if isinstance(method_name, str) else None
    section = _Section(doc, ("baseline",), raw, BASELINE_KEYS + (method.keys if method else ()), problems)
    if section.get("method") is None or method is None:
        return None
    values = {key.name: section.get(key.name) for key in method.keys}
    if method.rate_only and measure is not None and measure.kind != "rate":
        section.error(("baseline", "method"), f"baseline.method: {method.name} applies to rate measures, not {measure.kind}")
        return None
    if values.get("confidence") is not None and measure is not None and measure.kind != "rate":
        section.error(("baseline", "confidence"),
                      f"baseline.confidence applies to rate measures (a Wilson bound), not {measure.kind}")
        return None
    if values.get("history") and values.get("min_history") and values["min_history"] > values["history"]:
        section.error(("baseline", "min_history"),
                      f"baseline.min_history ({values['min_history']}) cannot exceed history ({values['history']})")
        return None
    if any(values.get(k.name) is None for k in method.keys if k.required):
        return None
    renamed = {("lam" if k == "lambda" else k): v for k, v in values.items() if v is not None}
    return Baseline(method=method.name, **renamed)
