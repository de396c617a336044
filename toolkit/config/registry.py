"""Every key a project or check file may hold, defined once as data: the key tables of each
section, and each measure kind and baseline method with the keys it takes.

The same rows drive validation (which keys a section takes, their types and defaults) and the
README's reference (a test fails when a key is undocumented), so adding a method is adding a row
and its SQL.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Key:
    """One YAML key: its type, whether it is required, its default, and what it means."""

    name: str
    type: str  # text | name | int | number | fraction | bool | duration | expr | column | columns | choice | mapping | list
    doc: str
    required: bool = False
    default: Any = None
    choices: tuple[str, ...] = ()
    minimum: float | None = None


@dataclass(frozen=True)
class Kind:
    """A measure kind or a baseline method: its keys, its macro in the stage template, its meaning."""

    name: str
    description: str
    keys: tuple[Key, ...]
    rate_only: bool = False


_UNIT = Key("unit", "text", "how values read in listings and messages: a unit written after the number "
           "(ms, kbps), or % for a fraction shown as a percentage; rates always read as %")

MEASURES: dict[str, Kind] = {
    k.name: k
    for k in (
        Kind(
            "rate",
            "share of the window's sessions that are bad: bad ÷ sessions",
            (
                Key("bad", "expr", "SQL boolean over source columns: which sessions count as bad", True),
                Key("split", "column", "one series per value of this column among bad sessions"),
            ),
        ),
        Kind(
            "ratio",
            "ratio of sums over the window's sessions: Σ numerator ÷ Σ denominator",
            (
                Key("numerator", "expr", "SQL numeric expression summed over sessions", True),
                Key("denominator", "expr", "SQL numeric expression summed over sessions", True),
                _UNIT,
            ),
        ),
        Kind(
            "quantile",
            "quantile_cont of a per-session value over the window (NULL values left out)",
            (
                Key("of", "expr", "SQL numeric expression per session", True),
                Key("q", "fraction", "the quantile, between 0 and 1", True),
                _UNIT,
            ),
        ),
    )
}

_HISTORY = (
    Key("history", "int", "how many earlier non-breaching windows of the series", True, minimum=1),
    Key("min_history", "int", "fewer earlier windows than this: no verdict yet", True, minimum=1),
)

_CONFIDENCE = Key(
    "confidence", "fraction",
    "rate: breach only if this window's Wilson score bound at this confidence is beyond the threshold",
)

BASELINES: dict[str, Kind] = {
    k.name: k
    for k in (
        Kind(
            "rolling_percentile",
            "threshold = max(floor, factor × quantile_cont(q) of the series' earlier window values)",
            (
                Key("q", "fraction", "quantile of earlier windows' values", True),
                *_HISTORY,
                Key("factor", "number", "multiplier on the quantile (below 1 for direction down)", False, 1.0, minimum=0),
                Key("floor", "number", "up: the threshold is never below this; down: never above it"),
                _CONFIDENCE,
            ),
        ),
        Kind(
            "p_chart",
            "threshold = p̄ ± sigmas × √(p̄(1−p̄)/n): p̄ pooled over earlier windows (Σbad ÷ Σsessions), "
            "n this window's sessions (NIST/SEMATECH e-Handbook §6.3.3.2)",
            (
                Key("sigmas", "number", "how many standard errors from p̄ the limit lies", False, 3.0, minimum=0),
                *_HISTORY,
                _CONFIDENCE,
            ),
            rate_only=True,
        ),
        Kind(
            "ewma",
            "EWMA chart (NIST/SEMATECH e-Handbook §6.3.2.4): z = λ·value + (1−λ)·z of the previous "
            "window; threshold = target ± sigmas × s × √(λ/(2−λ)), target and s the mean and standard "
            "deviation of earlier windows unless given",
            (
                Key("lambda", "fraction", "λ, the weight of the newest window in the moving average", True),
                Key("sigmas", "number", "how many standard deviations of the EWMA the limit lies", False, 3.0, minimum=0),
                *_HISTORY,
                Key("target", "number", "the series' known mean (default: mean of earlier windows)"),
                Key("sigma", "number", "the known standard deviation of one window's value "
                    "(default: of earlier windows)", minimum=0),
            ),
        ),
        Kind(
            "cusum",
            "Bernoulli CUSUM (Reynolds and Stoumbos 1999): S = max(0, S + bad − n·γ) window after "
            "window, γ from p₀ (pooled over earlier windows) and p₁ = shift × p₀; the window breaches "
            "when S > h, h chosen by Markov chain (Brook and Evans 1972) so that false alarms come "
            "once in in_control_sessions sessions",
            (
                Key("shift", "number", "the rise to detect, as a multiple of the in-control rate p₀ (above 1)", True),
                Key("in_control_sessions", "int", "about how many sessions in control between false alarms "
                    "(the chart's in-control average run length)", True, minimum=1),
                *_HISTORY,
            ),
            rate_only=True,
        ),
        Kind(
            "peers",
            "each window against the same time window of its peers (the series sharing peers_by), itself "
            "left out: rate, p₀ ± sigmas × √(φ p₀(1−p₀)(1/n + 1/N)), p₀ the peers' pooled rate over N sessions "
            "and φ their over-dispersion (funnel plot, Spiegelhalter 2005); ratio and quantile, the peers' median ± "
            "sigmas × 1.4826 × their median absolute deviation",
            (
                Key("peers_by", "columns", "the columns of 'by' that peers share: each series is compared "
                    "with the other series of the same values", True),
                Key("min_peers", "int", "fewer peers with a window of the same time than this: no verdict",
                    False, 3, minimum=2),
                Key("sigmas", "number", "how many standard errors (rate) or robust deviations (ratio, "
                    "quantile) from the peers' figure the limit lies", False, 3.0, minimum=0),
            ),
        ),
    )
}

SEVERITIES = ("high", "medium", "low")
DIRECTIONS = ("up", "down")


# ── the key tables of plimsoll.yml and the check files ─────────────────────────────────────────

ENGINES = ("duckdb", "spark")


PROJECT_KEYS = (
    Key("warehouse", "text", "the DuckDB file holding windows, alerts, runs and state", True),
    Key("checks", "text", "folder of check files (*.yml)", False, "checks/"),
    Key("sources", "mapping", "named session tables in the lake", True),
    Key("memory_limit", "text", "DuckDB memory limit for runs (default 1400MB); beyond it DuckDB spills to disk"),
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
    Key("iceberg_catalog", "mapping", "the Iceberg catalog that format: iceberg sources' tables are in"),
    Key("report_url", "text", "the http(s) URL where the team publishes the page `plimsoll report` writes: "
        "messages link each alert's card there"),
    Key("smtp", "mapping", "the mail server `plimsoll notify` sends mail through (below)"),
    Key("email", "list", "mail recipients `plimsoll notify` sends alert or incident events to (below)"),
)


CATALOG_KEYS = (
    Key("uri", "text", "a SQL catalog's SQLAlchemy URL (e.g. sqlite:///catalog.db, relative to plimsoll.yml) or "
        "a REST catalog's http(s):// URL", True),
    Key("warehouse", "text", "where the catalog keeps new tables' files (a folder or s3:// URL); needed by "
        "some catalogs, not for reading"),
    Key("name", "text", "the catalog's name", False, "plimsoll"),
    Key("properties", "mapping", "further catalog properties, as pyiceberg names them (e.g. s3.endpoint, "
        "token); values are text"),
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
    Key("per", "choice", "alert: one POST per alert event; incident: one per incident event (opened, updated, "
        "closed)", False, "alert", ("alert", "incident")),
    Key("body", "text", "a Jinja2 template of the request's body, rendered from the event (see Message "
        "templates); without it, the JSON payload"),
    Key("body_file", "text", "the body template in a file, relative to plimsoll.yml, instead of body"),
    Key("content_type", "text", "the body's media type: application/json or another JSON type (values escaped "
        "as JSON, the body checked to parse), or a text/ type", False, "application/json"),
)


SMTP_KEYS = (
    Key("host", "text", "the mail server's host name or address", True),
    Key("port", "int", "its port (default: 587 with starttls, 465 with tls, 25 with none)", minimum=1),
    Key("security", "choice", "starttls: upgrade the connection to TLS; tls: TLS from the start; none: plain "
        "(no user then: the password would cross the network in clear)", False, "starttls",
        ("starttls", "tls", "none")),
    Key("from", "text", "the sender's address", True),
    Key("user", "text", "the user to log in as (with password_env)"),
    Key("password_env", "envvar", "the NAME of the environment variable holding the password"),
    Key("timeout", "duration", "how long sending one message may take, from connecting to the server's answer",
        False, "10s"),
    Key("ca_file", "text", "a PEM file of the certificate authorities to trust, relative to plimsoll.yml "
        "(default: the system's)"),
)


EMAIL_KEYS = (
    Key("name", "text", "the recipients' identity in the outbox and in idempotency keys, unique among the "
        "webhooks' and email's names", True),
    Key("to", "list", "the addresses to send to", True),
    Key("per", "choice", "alert: one message per alert event; incident: one per incident event", False, "alert",
        ("alert", "incident")),
    Key("catch_up", "duration", "on the first notify, events older than this (in data time) are skipped, "
        "except the opening of an alert still open", False, "1d"),
)


NOTIFY_KEYS = (
    Key("growth", "number", "send an 'updated' event once affected_sessions grew by this share over the last "
        "one sent for the alert, or the incident with per: incident (0: every update)", False, 0.5, minimum=0),
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
    Key("path", "text", "folder, glob or file of Parquet, or an s3:// URL of them; hive partitions are read; "
        "format delta: the table's folder or s3:// URL (required unless format is iceberg)"),
    Key("format", "choice", "parquet: loose files, read by listing; delta or iceberg: a table, read by version "
        "(each run reads what the commits after the last version read added)", False, "parquet",
        ("parquet", "delta", "iceberg")),
    Key("table", "text", "format iceberg: the table's identifier in iceberg_catalog, e.g. fernhill.sessions"),
    Key("session_id", "column", "unique per session: duplicates are counted once", True),
    Key("event_time", "expr", "the data time that orders sessions and closes windows: a timestamp column, "
        "or an expression giving one (e.g. epoch_ms(ended_ms), ended_iso::TIMESTAMP)", True),
    Key("exclude", "expr", "SQL boolean: matching sessions never count (crawlers, tests)"),
    Key("max_future", "duration", "a session ending more than this after its file was written has an "
        "impossible event time: it is counted as invalid and never moves the watermark", False, "1d"),
    Key("dedup_horizon", "duration", "how far behind the newest data read (in data time) session ids are "
        "remembered to find repeats; an older session arriving later is counted as late and left out",
        False, "3d"),
    Key("attributes", "columns", "the columns `plimsoll explain` drills into to find where failures "
        "concentrate (a check may name its own)", False, []),
    Key("viewer_id", "column", "the viewer of a session (a column): alerts then count the distinct viewers hit, "
        "estimated from a HyperLogLog sketch; the id itself is never stored"),
    # the source alarms (wall clock, the one place it enters a decision; toolkit/engine/alarms.py)
    Key("max_silence", "duration", "wall-clock time without a new file after which a run opens a 'silent' "
        "alert for the source, closed when files arrive again"),
    Key("max_lag", "duration", "how far the source's newest data time may fall behind the wall clock before a "
        "run opens a 'lagging' alert for it, closed when it catches up"),
    Key("alarm_severity", "choice", "the severity of the source's silent and lagging alerts", False, "high",
        SEVERITIES),
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
    Key("guard", "mapping", "windows with too little data get no verdict"),
    Key("lifecycle", "mapping", "when an open alert closes"),
    Key("severity", "choice", "carried on alerts", False, "medium", SEVERITIES),
    Key("attributes", "columns", "the columns `plimsoll explain` drills into (default: the source's)"),
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
    Key("min_sessions", "int", "windows with fewer sessions get no verdict", False, 1, minimum=0),
    Key("min_bad", "int", "rate: a window beyond its threshold with fewer bad sessions gets no verdict", False, 0, minimum=0),
)


LIFECYCLE_KEYS = (
    Key("recover_after", "int", "this many healthy windows in a row close an open alert", False, 2, minimum=1),
    Key("expire_after", "duration", "no window at all for this long closes an open alert", False, "7d"),
    Key("reopen_within", "duration", "a breach this soon after a recovery reopens that alert", False, "6h"),
)
