"""The sources of ``plimsoll.yml``: where each lake is, its columns read from the files' footers
(local or ``s3://``), its event time and exclusions; the engine and storage settings they share."""

from __future__ import annotations

import importlib.util
from datetime import timedelta
from pathlib import Path
from typing import Any

import duckdb

from toolkit.config.expressions import unknown_column
from toolkit.config.fields import NAME, Section, kind_of
from toolkit.config.registry import CATALOG_KEYS, SOURCE_KEYS, STORAGE_KEYS
from toolkit.config.schema import Binder
from toolkit.config.yamlsource import Located
from toolkit.lake import files as lake
from toolkit.lake import storage
from toolkit.lake import tables
from toolkit.model import Catalog, Engine, Source, Storage
from toolkit.problems import DataError
from toolkit.problems import Problem, engine_message


def engine_settings(top: Section) -> Engine:
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
            top.error(("spark_conf", key), f"spark_conf.{key}: expected one value, got {kind_of(value)}")
        else:
            settings.append((str(key), str(value).lower() if isinstance(value, bool) else str(value)))
    return Engine(name, master, tuple(settings))


def storage_settings(doc: Located, raw: Any, problems: list[Problem]) -> Storage | None:
    """The ``storage`` mapping; credentials only as names of environment variables."""
    if raw is None:
        return None
    section = Section(doc, ("storage",), raw, STORAGE_KEYS, problems)
    values = {key.name: section.get(key.name) for key in STORAGE_KEYS}
    if bool(values["access_key_env"]) != bool(values["secret_key_env"]):
        given = "access_key_env" if values["access_key_env"] else "secret_key_env"
        section.error(("storage", given), "storage: access_key_env and secret_key_env go together; give both")
    return Storage(**{k: v for k, v in values.items() if v is not None})


def catalog_settings(doc: Located, raw: Any, root: Path, problems: list[Problem]) -> Catalog | None:
    """The ``iceberg_catalog`` mapping; a SQLite file or local warehouse relative to plimsoll.yml."""
    if raw is None:
        return None
    section = Section(doc, ("iceberg_catalog",), raw, CATALOG_KEYS, problems)
    uri, warehouse = section.get("uri"), section.get("warehouse")
    if uri is None:
        return None
    if uri.startswith("sqlite:///") and not uri.startswith("sqlite:////"):
        uri = "sqlite:///" + str(root / uri[len("sqlite:///"):])
    if warehouse and "://" not in warehouse:
        warehouse = "file://" + str(root / warehouse)
    properties = []
    for key, value in (section.get("properties") or {}).items():
        if isinstance(value, (dict, list)) or value is None:
            section.error(("iceberg_catalog", "properties", key),
                          f"iceberg_catalog.properties.{key}: expected one value, got {kind_of(value)}")
        else:
            properties.append((str(key), str(value).lower() if isinstance(value, bool) else str(value)))
    return Catalog(uri, warehouse, section.get("name") or "plimsoll", tuple(properties))


def _table_files(section: Section, name: str, source: Source) -> tuple[list[str] | None, str]:
    """A Delta or Iceberg source's current data files, and where its files lie (the table's root);
    None after a problem."""
    try:
        listing = tables.listing(source)
    except DataError as err:
        section.error((*section.path, "table" if source.format == "iceberg" else "path"), str(err))
        return None, source.path
    return [f.where for f in listing.active], listing.root if source.format == "iceberg" else source.path


def _remote_files(section: Section, name: str, where: str, settings: Storage | None,
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


def load_sources(doc: Located, raw: dict[str, Any], root: Path, con: duckdb.DuckDBPyConnection,
                  problems: list[Problem], check_schema: bool, engine: Engine,
                  settings: Storage | None, catalog: Catalog | None = None) -> dict[str, Source]:
    sources: dict[str, Source] = {}
    if not raw:
        problems.append(Problem(doc.file, doc.line(("sources",)), "at least one source is needed"))
    for name, body in raw.items():
        section = Section(doc, ("sources", name), body, SOURCE_KEYS, problems)
        if not NAME.match(name):
            section.error(section.path, f"source name '{name}' is not valid: use [a-z][a-z0-9_]*")
        where = section.get("path")
        session_id, event_time, exclude = section.get("session_id"), section.get("event_time"), section.get("exclude")
        limits = {"max_future": section.get("max_future"), "dedup_horizon": section.get("dedup_horizon")}
        limits = {k: v for k, v in limits.items() if v is not None} | _alarm_settings(section)
        fmt, table = section.get("format") or "parquet", section.get("table")
        # a source that cannot be read is kept without columns, so its checks report only their own problems
        unreadable = Source(name, where or "", session_id or "", event_time or "", None, {})
        if fmt == "iceberg":
            if table is None:
                section.error((*section.path, "format"), f"source '{name}': format: iceberg needs table "
                              "(the table's identifier in iceberg_catalog, e.g. fernhill.sessions)")
                sources[name] = unreadable
                continue
            if catalog is None:
                section.error((*section.path, "format"), f"source '{name}': format: iceberg needs "
                              "iceberg_catalog in plimsoll.yml (uri: sqlite:///catalog.db or a REST URL)")
                sources[name] = unreadable
                continue
            if where is not None:
                section.error((*section.path, "path"), f"source '{name}': an iceberg source is found by its "
                              "table in the catalog; leave path out")
                sources[name] = unreadable
                continue
            where = f"iceberg:{table}"
        else:
            if table is not None:
                section.error((*section.path, "table"), f"source '{name}': table applies to format: iceberg")
            if where is None:
                section.error(section.path, f"'sources.{name}': 'path' is required")
                sources[name] = unreadable
                continue
        if where is None:
            continue
        location = where if "://" in where or fmt == "iceberg" else str((root / where))
        remote = storage.is_remote(location)
        if "://" in where and not remote:
            section.error((*section.path, "path"), f"source '{name}': only local paths and s3:// URLs "
                          f"can be read, not {where.split('://')[0]}://")
            sources[name] = Source(name, location, session_id or "", event_time or "", None, {})
            continue
        common = {"engine": engine, "storage": settings if remote else None, "base": lake.base_of(location),
                  "attributes": tuple(section.get("attributes") or ()), "format": fmt, "table": table,
                  "catalog": catalog if fmt == "iceberg" else None, **limits}
        if fmt != "parquet":
            common["base"] = location.rstrip("/")
            if fmt == "iceberg":
                common["storage"] = settings
            if fmt == "delta" and not tables.available("delta"):
                section.error((*section.path, "format"), f"source '{name}': {tables.DELTA_HINT}")
                sources[name] = unreadable
                continue
            if fmt == "iceberg" and not tables.available("iceberg"):
                section.error((*section.path, "format"), f"source '{name}': {tables.ICEBERG_HINT}")
                sources[name] = unreadable
                continue
        columns: dict[str, str] = {}
        if check_schema:
            if fmt != "parquet":
                draft = Source(name, location, session_id or "", event_time or "", None, {}, **common)
                files, table_root = _table_files(section, name, draft)
                if files is not None and table_root != location:
                    location, common["base"] = table_root, table_root
                    if storage.is_remote(table_root):
                        storage.register(con, settings)
            else:
                files = (_remote_files(section, name, location, settings, con) if remote
                         else [f.path for f in lake.list_files(location)])
            unreadable = None
            if files == [] and fmt != "parquet":
                unreadable = f"source '{name}': the {fmt} table at '{where}' has no data files yet"
            elif files == []:
                unreadable = f"source '{name}': no Parquet files at '{where}'"
            elif files is not None:
                try:
                    remote_files = any(storage.is_remote(f) for f in files)
                    if remote_files and fmt != "parquet":
                        storage.register(con, settings)
                    columns = _readable_schema(con, files, settings if remote_files else None)
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
        binder = Binder(con, source)
        viewer = section.get("viewer_id")
        if check_schema:
            binder.column(section, session_id, "session_id")
            for index, column in enumerate(common["attributes"]):
                if column not in columns:
                    section.error((*section.path, "attributes", index),
                                  f"attributes: {unknown_column(column, columns)} in source '{name}'")
            viewer = binder.column(section, viewer, "viewer_id")
        if engine.name == "spark" and storage.is_remote(location):
            section.error((*section.path, "path" if fmt != "iceberg" else "table"),
                          f"source '{name}': cannot run on engine spark: its files are in object storage "
                          f"({location}), which Spark's executors cannot read here (pyspark has no S3 connector); "
                          "use engine: duckdb, or mount the bucket at one path on every worker and name that path")
        if viewer is not None and engine.name == "spark":
            section.error((*section.path, "viewer_id"), f"{'.'.join((*section.path, 'viewer_id'))}: cannot run on "
                          "engine spark: the viewer sketch is computed by DuckDB only; leave viewer_id out")
            viewer = None
        time = binder.time(section, event_time)
        excl = binder.expr(section, exclude, "exclude", "boolean")
        sources[name] = Source(name, location, session_id or "", event_time or "", excl, columns, time=time,
                               viewer_id=viewer, **common)
    return sources


def _alarm_settings(section: Section) -> dict[str, Any]:
    """The source alarms' keys: ``max_silence`` and ``max_lag`` (longer than 0s), and their severity."""
    found: dict[str, Any] = {}
    for key in ("max_silence", "max_lag"):
        value = section.get(key)
        if value is not None and value <= timedelta(0):
            section.error((*section.path, key), f"{'.'.join((*section.path, key))} must be longer than 0s")
        elif value is not None:
            found[key] = value
    severity = section.get("alarm_severity")
    if severity is not None:
        found["alarm_severity"] = severity
    return found


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
