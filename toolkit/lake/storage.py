"""Object-storage lakes: ``s3://bucket/prefix/`` sources read through s3fs.

DuckDB's own network extension is not needed: an ``s3fs.S3FileSystem`` is registered on every
connection that reads an ``s3://`` source, and the same settings list the files, so a run sees
each object's size and LastModified time for its incremental bookkeeping. Secrets never sit in
``plimsoll.yml``: the ``storage`` mapping names the environment variables that hold them, and
without it the usual AWS variables and files apply.
"""

from __future__ import annotations

import os
from typing import Any

import duckdb

from toolkit.model import Storage

SCHEME = "s3://"
OTHER_SCHEMES = ("s3a://", "gs://", "gcs://", "az://", "abfs://", "http://", "https://")
INSTALL_HINT = "s3:// sources need s3fs: pip install 'plimsoll[s3]'"


class StorageError(Exception):
    """The object store could not be listed or read; the message is one line for a user."""


def is_remote(path: str) -> bool:
    return path.startswith(SCHEME)


def unsupported_scheme(path: str) -> str | None:
    """The scheme of a URL Plimsoll cannot read (only ``s3://`` is supported), else None."""
    for scheme in OTHER_SCHEMES:
        if path.startswith(scheme):
            return scheme
    return None


def available() -> bool:
    try:
        import s3fs  # noqa: F401
    except ImportError:
        return False
    return True


def endpoint(settings: Storage | None) -> str | None:
    """Where requests go: the project's endpoint_url, else AWS_ENDPOINT_URL_S3 / AWS_ENDPOINT_URL."""
    if settings is not None and settings.endpoint_url:
        return settings.endpoint_url
    return os.environ.get("AWS_ENDPOINT_URL_S3") or os.environ.get("AWS_ENDPOINT_URL") or None


def missing_variables(settings: Storage | None) -> list[str]:
    """Environment variables the settings name that are not set (their values are never shown)."""
    if settings is None:
        return []
    named = (settings.access_key_env, settings.secret_key_env, settings.session_token_env)
    return [name for name in named if name and not os.environ.get(name)]


def filesystem(settings: Storage | None) -> Any:
    """A fresh S3FileSystem: no instance reuse and no listing cache, so every run sees new objects."""
    try:
        import s3fs
    except ImportError:
        raise StorageError(INSTALL_HINT) from None
    settings = settings or Storage()
    missing = missing_variables(settings)
    if missing:
        raise StorageError(f"environment variable {missing[0]} named in storage is not set")
    client: dict[str, Any] = {}
    if endpoint(settings):
        client["endpoint_url"] = endpoint(settings)
    region = settings.region or os.environ.get("AWS_DEFAULT_REGION") or os.environ.get("AWS_REGION")
    if region:
        client["region_name"] = region
    config: dict[str, Any] = {}
    if settings.addressing_style != "auto":
        config["s3"] = {"addressing_style": settings.addressing_style}
    options: dict[str, Any] = {
        "anon": settings.anonymous,
        "client_kwargs": client,
        "config_kwargs": config,
        "skip_instance_cache": True,
        "use_listings_cache": False,
    }
    if settings.access_key_env:
        options["key"] = os.environ[settings.access_key_env]
        options["secret"] = os.environ[settings.secret_key_env]
    if settings.session_token_env:
        options["token"] = os.environ[settings.session_token_env]
    if settings.profile:
        options["profile"] = settings.profile
    return s3fs.S3FileSystem(**options)


def register(con: duckdb.DuckDBPyConnection, settings: Storage | None) -> None:
    """Let DuckDB read ``s3://`` paths on this connection through s3fs (once per connection)."""
    if "s3" not in con.list_filesystems():
        con.register_filesystem(filesystem(settings))


def list_objects(path: str, settings: Storage | None) -> list[tuple[str, int, Any, str | None]]:
    """(url, size, LastModified, ETag) of every ``.parquet`` object under a prefix, matching a
    glob, or at that key; listed afresh on every call."""
    fs = filesystem(settings)
    fs.invalidate_cache()
    bare = path[len(SCHEME):]
    try:
        if any(ch in bare for ch in "*?["):
            found = fs.glob(bare, detail=True)
        elif bare.endswith("/") or "/" not in bare.rstrip("/"):
            found = fs.find(bare, detail=True)
        else:
            info = fs.info(bare)
            found = fs.find(bare, detail=True) if info["type"] == "directory" else {bare: info}
    except FileNotFoundError as err:
        if "bucket" in str(err).lower():
            raise StorageError(f"bucket '{_bucket(path)}' does not exist{_at(settings)}") from None
        return []
    except Exception as err:  # botocore and aiohttp errors have no common base but Exception
        raise StorageError(describe(err, path, settings)) from None
    out = []
    for name, info in sorted(found.items()):
        leaf = name.rsplit("/", 1)[-1]
        if info.get("type") != "file" or leaf.startswith((".", "_")):
            continue
        if not any(ch in bare for ch in "*?[") and not leaf.endswith(".parquet"):
            continue
        out.append((SCHEME + name, int(info["size"]), info.get("LastModified"), info.get("ETag")))
    return out


def describe(err: BaseException, path: str, settings: Storage | None) -> str:
    """One line for a failed request: unreachable endpoint, missing bucket, access denied, other."""
    kind = type(err).__name__
    text = str(err).strip().splitlines()[0] if str(err).strip() else kind
    if kind in ("EndpointConnectionError", "ConnectTimeoutError", "ConnectionClosedError",
                "ClientConnectorError", "ServerTimeoutError") or "Could not connect" in text:
        where = endpoint(settings) or "the AWS endpoint"
        return f"cannot reach the object store at {where}"
    if kind == "NoCredentialsError":
        return ("no credentials: set AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, or name the "
                "variables in storage.access_key_env and storage.secret_key_env")
    if isinstance(err, PermissionError):
        return f"access denied to {path}{_at(settings)}: {text}"
    if isinstance(err, FileNotFoundError) and "bucket" in text.lower():
        return f"bucket '{_bucket(path)}' does not exist{_at(settings)}"
    return f"{kind}: {text}"


def _bucket(path: str) -> str:
    return path[len(SCHEME):].split("/", 1)[0]


def _at(settings: Storage | None) -> str:
    where = endpoint(settings)
    return f" at {where}" if where else ""
