"""The typed form of a project: what validation produces and what the compiler consumes.

Nothing here reads files or builds SQL; a model is only ever made by :mod:`toolkit.config.project`, which
guarantees that every expression in it was parsed and checked against the source's columns.
"""

from __future__ import annotations

import urllib.parse
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path


@dataclass(frozen=True)
class Expr:
    """A user's SQL expression: as written, and as regenerated from its checked parse tree."""

    text: str
    sql: str
    columns: tuple[str, ...]

    def __str__(self) -> str:
        return self.sql


@dataclass(frozen=True)
class Engine:
    """Where the stages that touch every session run (source, scan, window, measure).

    ``duckdb``: in process, on the warehouse connection. ``spark``: as Spark SQL on the cluster at
    ``spark_master``, reading the same Parquet; the windows come back to the warehouse, where the
    baselines and the life cycle run as before.
    """

    name: str = "duckdb"
    spark_master: str | None = None
    spark_conf: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class Storage:
    """How ``s3://`` sources are reached; secrets are named by environment variable, never held."""

    endpoint_url: str | None = None
    region: str | None = None
    profile: str | None = None
    access_key_env: str | None = None
    secret_key_env: str | None = None
    session_token_env: str | None = None
    anonymous: bool = False
    addressing_style: str = "auto"


@dataclass(frozen=True)
class Catalog:
    """An Iceberg catalog (``iceberg_catalog``): a SQL catalog at a SQLAlchemy URL (e.g. a SQLite
    file) or a REST catalog at an http(s) URL, with pyiceberg's further properties."""

    uri: str
    warehouse: str | None = None
    name: str = "plimsoll"
    properties: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class Source:
    """A table of sessions in the lake, and the engine that reads it (the project's)."""

    name: str
    path: str
    session_id: str
    event_time: str                  # as written: a column name or an expression over columns
    exclude: Expr | None
    columns: dict[str, str] = field(default_factory=dict, hash=False, compare=False)
    engine: Engine = field(default_factory=Engine)
    # Read only sessions before this data time; set by a backtest replaying the lake up to a moment.
    until: datetime | None = None
    storage: Storage | None = None  # the project's storage settings, for s3:// paths
    # the event time as checked SQL (a quoted column, or the regenerated expression)
    time: Expr | None = None
    # a session ending later than its file's modification time + max_future has an impossible time
    max_future: timedelta = timedelta(days=1)
    # session ids are remembered this long behind the data read (in data time), to find repeats
    dedup_horizon: timedelta = timedelta(days=3)

    # what the files' paths are recorded relative to (see toolkit.lake.files.base_of)
    base: str = ""
    # a column naming the viewer: affected viewers are estimated from a HyperLogLog sketch of it
    # (only the sketch is kept, never the id)
    viewer_id: str | None = None
    # the columns `plimsoll explain` drills into
    attributes: tuple[str, ...] = ()
    # parquet: a folder of files, read by listing; delta or iceberg: a table, read by version
    format: str = "parquet"
    table: str | None = None         # iceberg: the table's identifier in the catalog (namespace.name)
    catalog: Catalog | None = None   # iceberg: the project's catalog
    # source alarms, in wall-clock time (the one place it enters a decision): a run opens a 'silent'
    # alert when no new file has arrived for max_silence, a 'lagging' one when the newest data time
    # read is more than max_lag behind the clock; None: not watched
    max_silence: timedelta | None = None
    max_lag: timedelta | None = None
    alarm_severity: str = "high"

    @property
    def time_columns(self) -> tuple[str, ...]:
        """The columns the event time is computed from."""
        return self.time.columns if self.time is not None else (self.event_time,)


@dataclass(frozen=True)
class Measure:
    """What a window's value is: a rate of bad sessions, a ratio of sums, or a quantile."""

    kind: str
    bad: Expr | None = None
    split: str | None = None
    numerator: Expr | None = None
    denominator: Expr | None = None
    of: Expr | None = None
    q: float | None = None
    unit: str | None = None          # ratio, quantile: how values read ('ms', 'kbps', '%'); display only


@dataclass(frozen=True)
class Window:
    """Count windows (``sessions``, ``max_wait``) or time windows (``every``, ``lateness``)."""

    sessions: int | None = None
    max_wait: timedelta | None = None
    every: timedelta | None = None
    lateness: timedelta = timedelta(0)

    @property
    def kind(self) -> str:
        return "count" if self.sessions is not None else "time"


@dataclass(frozen=True)
class Baseline:
    """How a window's threshold follows from the series' earlier, non-breaching windows."""

    method: str
    history: int | None = None       # None for peers, which compares with other series, not history
    min_history: int | None = None
    q: float | None = None
    factor: float = 1.0
    floor: float | None = None
    sigmas: float | None = None
    confidence: float | None = None
    lam: float | None = None  # EWMA λ (`lambda` in YAML)
    target: float | None = None
    sigma: float | None = None
    shift: float | None = None  # cusum: p₁ = shift × p₀
    in_control_sessions: int | None = None  # cusum: the in-control average run length, in sessions
    peers_by: tuple[str, ...] = ()  # peers: the columns of `by` a series' peers share
    min_peers: int | None = None


@dataclass(frozen=True)
class Guard:
    """Windows with too little data to be trusted get no verdict."""

    min_sessions: int = 1
    min_bad: int = 0


@dataclass(frozen=True)
class Lifecycle:
    """When an open alert closes."""

    recover_after: int = 2
    expire_after: timedelta = timedelta(days=7)
    reopen_within: timedelta = timedelta(hours=6)


@dataclass(frozen=True)
class Check:
    """One check file, validated."""

    name: str
    about: str
    source: Source
    where: Expr | None
    by: tuple[str, ...]
    measure: Measure
    direction: str
    window: Window
    baseline: Baseline
    guard: Guard
    lifecycle: Lifecycle
    severity: str
    file: str
    line: int
    # the columns `plimsoll explain` drills into: the check's own, else the source's
    attributes: tuple[str, ...] = ()


@dataclass(frozen=True)
class Webhook:
    """An endpoint that ``plimsoll notify`` POSTs alert events to; ``name`` is its identity.

    The URL's path and query often carry a secret token, so anything shown or stored names the
    endpoint only as ``scheme://host:port``; ``headers`` maps a header to the *name* of the
    environment variable holding its value, read when delivering.
    """

    name: str
    url: str
    timeout: timedelta = timedelta(seconds=10)
    headers: tuple[tuple[str, str], ...] = ()   # (header name, environment variable name)
    catch_up: timedelta = timedelta(days=1)     # first notify: events older than this in data time are skipped
    per: str = "alert"                          # 'alert': alert events; 'incident': incident events
    body: str | None = None                     # a Jinja2 template of the body; None: the JSON payload
    content_type: str = "application/json"
    body_origin: str = ""                       # where the template is written, for messages: 'plimsoll.yml:12'

    @property
    def endpoint(self) -> str:
        return endpoint(self.url)


@dataclass(frozen=True)
class Smtp:
    """The mail server ``plimsoll notify`` sends through. ``password_env`` is the *name* of the
    environment variable holding the password, read when sending."""

    host: str
    port: int
    security: str = "starttls"                  # 'starttls' | 'tls' | 'none'
    sender: str = ""
    user: str | None = None
    password_env: str | None = None
    timeout: timedelta = timedelta(seconds=10)
    ca_file: Path | None = None                 # certificate authorities to trust; None: the system's

    @property
    def endpoint(self) -> str:
        return f"smtp://{self.host}:{self.port}"


@dataclass(frozen=True)
class Mailbox:
    """Mail recipients ``plimsoll notify`` sends one plain-text message per event to; ``name`` is its
    identity in the outbox, shared with the webhooks'."""

    name: str
    to: tuple[str, ...]
    smtp: Smtp
    catch_up: timedelta = timedelta(days=1)
    per: str = "alert"

    @property
    def endpoint(self) -> str:
        return self.smtp.endpoint


def endpoint(url: str) -> str:
    """``scheme://host:port`` of a URL: what may be shown or stored of it (no user, path or query)."""
    parts = urllib.parse.urlsplit(url)
    try:
        port = parts.port
    except ValueError:
        port = None
    if not parts.hostname:
        return f"{parts.scheme}://" if parts.scheme else "(no host)"
    host = f"[{parts.hostname}]" if ":" in parts.hostname else parts.hostname
    port = port or {"http": 80, "https": 443}.get(parts.scheme)
    return f"{parts.scheme}://{host}" + (f":{port}" if port else "")


@dataclass(frozen=True)
class Notify:
    """Which alert events ``plimsoll notify`` sends, and how it retries."""

    growth: float = 0.5                        # an 'updated' event goes out once affected_sessions grew this much
    max_attempts: int = 8                      # failed attempts before a delivery is abandoned
    backoff: timedelta = timedelta(seconds=30)   # wait after the first failure; doubled after each one
    max_backoff: timedelta = timedelta(hours=1)  # the longest wait between two attempts


@dataclass(frozen=True)
class Project:
    """A loaded ``plimsoll.yml`` with its sources and checks."""

    file: Path
    root: Path
    warehouse: Path
    checks_dir: Path
    sources: dict[str, Source]
    checks: dict[str, Check]
    memory_limit: str | None = None
    threads: int | None = None
    max_read_per_run: int | None = None   # bytes; None: the default (toolkit.engine.runner.DEFAULT_MAX_READ)
    webhooks: tuple[Webhook, ...] = ()
    notify: Notify = field(default_factory=Notify)
    engine: Engine = field(default_factory=Engine)
    storage: Storage | None = None
    mailboxes: tuple[Mailbox, ...] = ()
    report_url: str | None = None         # where the team publishes `plimsoll report`'s page: messages link to it

    @property
    def remote(self) -> bool:
        """Whether any source is read from object storage (so connections need the filesystem)."""
        return any(s.path.startswith("s3://") for s in self.sources.values())
