"""Object-storage lakes: s3:// sources against a real S3-protocol server on 127.0.0.1.

The server is moto's, started in this process by a fixture, so nothing outside the test extra is
needed. Each test gets its own bucket; the lake is the committed fixture lake, uploaded with its
hive partitions (``day=2026-11-02/part-0.parquet``).
"""

from __future__ import annotations

import logging
import shutil
import socket
import uuid
from pathlib import Path

import boto3
import duckdb
import moto.settings
import pytest
from moto.server import ThreadedMotoServer

from conftest import FIXTURE_LAKE
from toolkit.problems import DataError, ProjectInvalid
from toolkit.config.project import load_project
from toolkit.engine.runner import run

GOLDEN = Path(__file__).parent / "golden"
CHECKS = ("title_decode_errors.yml", "site_failures_p_chart.yml")
DAYS = sorted(p.parent.name for p in FIXTURE_LAKE.glob("day=*/part-0.parquet"))
KEY_VAR, SECRET_VAR = "FERNHILL_LAKE_KEY", "FERNHILL_LAKE_SECRET"

PROJECT = """\
warehouse: warehouse.duckdb
checks: checks/
storage:
  endpoint_url: {endpoint}
  region: eu-west-1
  access_key_env: FERNHILL_LAKE_KEY
  secret_key_env: FERNHILL_LAKE_SECRET
sources:
  sessions:
    path: {path}
    session_id: session_id
    event_time: ended_at
    exclude: is_bot
"""

# the same project with no storage mapping: local lakes, or the usual AWS environment variables
WITHOUT_STORAGE = PROJECT.split("storage:")[0] + "sources:" + PROJECT.split("sources:")[1]

WINDOWS = ("SELECT check_name, key_text, split_value, window_number, window_start, window_end, sessions, bad, "
           "value, threshold, breach FROM windows ORDER BY ALL")
ALERTS = ("SELECT check_name, key_text, split_value, status, close_reason, opened_at, closed_at, "
          "breach_windows, affected_sessions, peak_value, threshold, fingerprint FROM alerts ORDER BY ALL")


@pytest.fixture(scope="module")
def endpoint():
    logging.getLogger("werkzeug").setLevel(logging.ERROR)
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    host, port = server.get_host_and_port()
    yield f"http://{host}:{port}"
    server.stop()


@pytest.fixture
def bucket(endpoint, monkeypatch):
    """A fresh bucket, and the credentials the project names in the environment."""
    monkeypatch.setenv(KEY_VAR, "fernhill-test-key")
    monkeypatch.setenv(SECRET_VAR, "fernhill-test-secret")
    name = f"fernhill-lake-{uuid.uuid4().hex[:12]}"
    client = boto3.client("s3", endpoint_url=endpoint, region_name="eu-west-1",
                          aws_access_key_id="fernhill-test-key", aws_secret_access_key="fernhill-test-secret")
    client.create_bucket(Bucket=name, CreateBucketConfiguration={"LocationConstraint": "eu-west-1"})
    return name, client


def upload(client, name: str, day: str, prefix: str = "sessions") -> None:
    client.upload_file(str(FIXTURE_LAKE / day / "part-0.parquet"), name, f"{prefix}/{day}/part-0.parquet")


def project(folder: Path, endpoint: str, path: str, body: str = PROJECT) -> Path:
    (folder / "checks").mkdir(parents=True, exist_ok=True)
    for check in CHECKS:
        shutil.copyfile(GOLDEN / check, folder / "checks" / check)
    (folder / "plimsoll.yml").write_text(body.format(endpoint=endpoint, path=path), encoding="utf-8")
    return folder / "plimsoll.yml"


def local_twin(folder: Path, days: list[str]) -> Path:
    """The same files in a local lake, and a project over it."""
    for day in days:
        (folder / "lake" / day).mkdir(parents=True, exist_ok=True)
        shutil.copyfile(FIXTURE_LAKE / day / "part-0.parquet", folder / "lake" / day / "part-0.parquet")
    return project(folder, "unused", "lake/", body=WITHOUT_STORAGE)


def results(project_file: Path) -> tuple[list, list]:
    con = duckdb.connect(str(project_file.parent / "warehouse.duckdb"), read_only=True)
    try:
        return con.execute(WINDOWS).fetchall(), con.execute(ALERTS).fetchall()
    finally:
        con.close()


def closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_validation_reads_the_schema_from_s3_with_hive_columns(tmp_path, endpoint, bucket):
    name, client = bucket
    for day in DAYS:
        upload(client, name, day)
    loaded = load_project(project(tmp_path, endpoint, f"s3://{name}/sessions/"))
    columns = loaded.sources["sessions"].columns
    assert columns["day"] == "DATE" and columns["ended_at"] == "TIMESTAMP"
    assert set(loaded.checks) == {"title_decode_errors", "site_failures_p_chart"}


def test_an_unknown_column_is_found_against_the_s3_schema(tmp_path, endpoint, bucket):
    name, client = bucket
    upload(client, name, DAYS[0])
    file = project(tmp_path, endpoint, f"s3://{name}/sessions/")
    text = (tmp_path / "checks" / "title_decode_errors.yml").read_text()
    (tmp_path / "checks" / "title_decode_errors.yml").write_text(text.replace("by: [site, title_id]", "by: [site, titel_id]"))
    with pytest.raises(ProjectInvalid) as err:
        load_project(file)
    assert "title_decode_errors.yml:4: by: unknown column 'titel_id'" in str(err.value)


def test_s3_lake_gives_the_same_windows_and_alerts_as_the_local_lake(tmp_path, endpoint, bucket):
    name, client = bucket
    for day in DAYS:
        upload(client, name, day)
    remote = project(tmp_path / "remote", endpoint, f"s3://{name}/sessions/")
    local = local_twin(tmp_path / "local", DAYS)
    done = run(load_project(remote))
    run(load_project(local))
    assert done.files_read == len(DAYS)
    windows, alerts = results(remote)
    assert windows and (windows, alerts) == results(local)
    con = duckdb.connect(str(remote.parent / "warehouse.duckdb"), read_only=True)
    paths = [row[0] for row in con.execute("SELECT DISTINCT path FROM files_read ORDER BY 1").fetchall()]
    con.close()
    # named relative to the source's prefix, as local files are relative to its folder
    assert paths == [f"{day}/part-0.parquet" for day in DAYS]


def test_an_incremental_run_reads_only_the_new_object(tmp_path, endpoint, bucket):
    name, client = bucket
    upload(client, name, DAYS[0])
    remote = project(tmp_path / "remote", endpoint, f"s3://{name}/sessions/")
    loaded = load_project(remote)
    assert run(loaded).files_read == 1
    upload(client, name, DAYS[1])  # lands after the first run: the next listing must see it
    second = run(loaded)
    assert second.files_read == 1
    con = duckdb.connect(str(remote.parent / "warehouse.duckdb"), read_only=True)
    rows = con.execute("SELECT run_id, files_read, rows_read FROM runs ORDER BY run_id").fetchall()
    read = con.execute("SELECT run_id, path, size, modified_at FROM files_read "
                       "WHERE check_name = 'title_decode_errors' ORDER BY run_id").fetchall()
    con.close()
    new_rows = duckdb.connect().execute("SELECT count(*) FROM read_parquet($f)",
                                        {"f": str(FIXTURE_LAKE / DAYS[1] / "part-0.parquet")}).fetchone()[0]
    assert rows[1] == (2, 1, new_rows)
    assert [(r[0], r[1]) for r in read] == [(1, f"{DAYS[0]}/part-0.parquet"), (2, f"{DAYS[1]}/part-0.parquet")]
    assert read[1][2] == (FIXTURE_LAKE / DAYS[1] / "part-0.parquet").stat().st_size
    assert read[1][3] is not None
    assert run(loaded).files_read == 0

    local = local_twin(tmp_path / "local", DAYS[:1])
    run(load_project(local))
    local_twin(tmp_path / "local", DAYS)
    run(load_project(local))
    assert results(remote) == results(local)


def test_an_object_rewritten_after_it_was_read_is_reported_not_read_again(tmp_path, endpoint, bucket):
    name, client = bucket
    upload(client, name, DAYS[0])
    loaded = load_project(project(tmp_path, endpoint, f"s3://{name}/sessions/"))
    run(loaded)
    # the same key, other bytes: its size and LastModified change
    client.upload_file(str(FIXTURE_LAKE / DAYS[1] / "part-0.parquet"), name, f"sessions/{DAYS[0]}/part-0.parquet")
    again = run(loaded)
    assert again.files_read == 0
    assert any(change.startswith(f"s3://{name}/sessions/{DAYS[0]}/part-0.parquet") for change in again.changed_files)


def test_credentials_and_endpoint_from_the_usual_environment_variables(tmp_path, endpoint, bucket, monkeypatch):
    name, client = bucket
    upload(client, name, DAYS[0])
    monkeypatch.setenv("AWS_ACCESS_KEY_ID", "fernhill-env-key")
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "fernhill-env-secret")
    monkeypatch.setenv("AWS_ENDPOINT_URL", endpoint)
    monkeypatch.setenv("AWS_DEFAULT_REGION", "eu-west-1")
    loaded = load_project(project(tmp_path, "unused", f"s3://{name}/sessions/", body=WITHOUT_STORAGE))
    assert loaded.storage is None
    assert run(loaded, ["title_decode_errors"]).files_read == 1


def test_a_glob_and_a_single_object(tmp_path, endpoint, bucket):
    name, client = bucket
    for day in DAYS:
        upload(client, name, day)
    client.put_object(Bucket=name, Key="sessions/_SUCCESS", Body=b"")
    client.put_object(Bucket=name, Key="sessions/notes.txt", Body=b"not parquet")
    from toolkit.lake import files as lake, storage
    settings = load_project(project(tmp_path, endpoint, f"s3://{name}/sessions/")).storage
    everything = lake.list_files(f"s3://{name}/sessions/", settings)
    assert [f.path for f in everything] == [f"s3://{name}/sessions/{d}/part-0.parquet" for d in DAYS]
    one_day = lake.list_files(f"s3://{name}/sessions/{DAYS[1]}/*.parquet", settings)
    assert [f.path for f in one_day] == [f"s3://{name}/sessions/{DAYS[1]}/part-0.parquet"]
    single = lake.list_files(f"s3://{name}/sessions/{DAYS[0]}/part-0.parquet", settings)
    assert len(single) == 1 and single[0].size == everything[0].size
    assert lake.list_files(f"s3://{name}/elsewhere/", settings) == []
    assert storage.is_remote(single[0].path)


def test_a_missing_bucket_is_one_line_naming_the_source_and_path(tmp_path, endpoint, bucket, monkeypatch):
    monkeypatch.chdir(tmp_path)
    file = project(tmp_path, endpoint, "s3://fernhill-no-such-bucket/sessions/")
    with pytest.raises(ProjectInvalid) as err:
        load_project(file)
    message = str(err.value)
    assert message == (f"plimsoll.yml:10: source 'sessions': s3://fernhill-no-such-bucket/sessions/: "
                       f"bucket 'fernhill-no-such-bucket' does not exist at {endpoint}")
    # a run (whose project was validated earlier) says the same in one line
    with pytest.raises(DataError) as err:
        run(load_project(file, check_schema=False))
    assert str(err.value) == ("source 'sessions': s3://fernhill-no-such-bucket/sessions/: "
                              f"bucket 'fernhill-no-such-bucket' does not exist at {endpoint}")


def test_an_unreachable_endpoint_is_one_line_naming_the_source_and_path(tmp_path, bucket, monkeypatch):
    monkeypatch.chdir(tmp_path)
    unreachable = f"http://127.0.0.1:{closed_port()}"
    file = project(tmp_path, unreachable, "s3://fernhill-lake/sessions/")
    with pytest.raises(ProjectInvalid) as err:
        load_project(file)
    assert str(err.value) == (f"plimsoll.yml:10: source 'sessions': s3://fernhill-lake/sessions/: "
                              f"cannot reach the object store at {unreachable}")
    with pytest.raises(DataError) as err:
        run(load_project(file, check_schema=False))
    assert str(err.value) == f"source 'sessions': s3://fernhill-lake/sessions/: cannot reach the object store at {unreachable}"
    assert not (tmp_path / "warehouse.duckdb").exists() or _runs(tmp_path) == [("failed",)]


def test_access_denied_is_one_line_naming_the_source_and_path(tmp_path, endpoint, bucket, monkeypatch):
    monkeypatch.chdir(tmp_path)
    name, client = bucket
    upload(client, name, DAYS[0])
    file = project(tmp_path, endpoint, f"s3://{name}/sessions/")
    # the server now checks every request's access key, and the project's is unknown to it
    monkeypatch.setattr(moto.settings, "INITIAL_NO_AUTH_ACTION_COUNT", 0)
    with pytest.raises(ProjectInvalid) as err:
        load_project(file)
    message = str(err.value)
    assert "\n" not in message
    assert message.startswith(f"plimsoll.yml:10: source 'sessions': s3://{name}/sessions/: "
                              f"access denied to s3://{name}/sessions/ at {endpoint}: ")


def _runs(folder: Path) -> list[tuple]:
    con = duckdb.connect(str(folder / "warehouse.duckdb"), read_only=True)
    try:
        return con.execute("SELECT status FROM runs").fetchall()
    finally:
        con.close()


STORAGE_CASES = {
    "unknown key": ("storage:\n  endpoint: http://x\n", "plimsoll.yml:3: unknown key 'endpoint' in storage "
                    "(did you mean 'endpoint_url'?)"),
    "a secret instead of a variable name": (
        "storage:\n  access_key_env: AKIA/not+a-name\n  secret_key_env: FERNHILL_LAKE_SECRET\n",
        # the value is not repeated: it may be the secret itself
        "plimsoll.yml:3: storage.access_key_env: this is not an environment variable name (letters, digits "
        "and _): write the variable's name, not its value"),
    "key without secret": ("storage:\n  access_key_env: FERNHILL_LAKE_KEY\n",
                           "plimsoll.yml:3: storage: access_key_env and secret_key_env go together; give both"),
    "addressing style": ("storage:\n  addressing_style: sideways\n",
                         "plimsoll.yml:3: storage.addressing_style: 'sideways' is not one of auto, path, virtual"),
    "anonymous not a boolean": ("storage:\n  anonymous: sometimes\n",
                                "plimsoll.yml:3: storage.anonymous: expected true or false, got text 'sometimes'"),
    "unset variable": ("storage:\n  access_key_env: FERNHILL_UNSET_KEY\n  secret_key_env: FERNHILL_LAKE_SECRET\n",
                       "plimsoll.yml:3: storage.access_key_env: environment variable FERNHILL_UNSET_KEY is not set"),
    "another scheme": ("", "plimsoll.yml:4: source 'sessions': only local paths and s3:// URLs can be read, "
                       "not gs://"),
}


@pytest.mark.parametrize("case", sorted(STORAGE_CASES))
def test_storage_keys_are_validated_with_file_and_line(tmp_path, case, monkeypatch):
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv(SECRET_VAR, "x")
    monkeypatch.delenv("FERNHILL_UNSET_KEY", raising=False)
    storage_text, expected = STORAGE_CASES[case]
    path = "gs://fernhill-lake/sessions/" if case == "another scheme" else "s3://fernhill-lake/sessions/"
    (tmp_path / "checks").mkdir()
    (tmp_path / "plimsoll.yml").write_text(
        f"warehouse: w.duckdb\n{storage_text}sources:\n  sessions:\n    path: {path}\n"
        "    session_id: session_id\n    event_time: ended_at\n", encoding="utf-8")
    with pytest.raises(ProjectInvalid) as err:
        load_project(tmp_path / "plimsoll.yml", check_schema=case == "unset variable")
    assert expected in str(err.value).splitlines()


def test_an_error_raised_inside_s3fs_reads_as_its_exception_line():
    from toolkit.problems import engine_message

    raised = duckdb.Error("Traceback (most recent call last):\n  File \"s3fs/core.py\", line 216, in _error_wrapper\n"
                          "    raise err\nFileNotFoundError: The specified key does not exist.\n\n"
                          "LINE 1: SELECT * FROM read_parquet(...)")
    assert engine_message(raised) == "FileNotFoundError: The specified key does not exist."
    assert engine_message(duckdb.Error("Binder Error: column x\nLINE 1: ...")) == "Binder Error: column x"


def test_a_delta_table_in_s3_is_read_by_version_as_a_local_one_is(tmp_path, endpoint, bucket):
    """format: delta on s3://: the table opened by delta-rs and its log read by DuckDB, both through
    the project's storage settings; an append, a compaction and an append read as loose files."""
    import pyarrow.parquet as pq
    from deltalake import DeltaTable, write_deltalake

    name, _client = bucket
    url = f"s3://{name}/sessions_delta"
    writer = {"AWS_ENDPOINT_URL": endpoint, "AWS_ALLOW_HTTP": "true", "AWS_REGION": "eu-west-1",
              "AWS_ACCESS_KEY_ID": "fernhill-test-key", "AWS_SECRET_ACCESS_KEY": "fernhill-test-secret",
              "AWS_S3_ALLOW_UNSAFE_RENAME": "true"}
    days = [pq.read_table(FIXTURE_LAKE / day / "part-0.parquet") for day in DAYS]
    remote = project(tmp_path / "remote", endpoint, url,
                     body=PROJECT.replace("    path: {path}\n", "    format: delta\n    path: {path}\n"))
    write_deltalake(url, days[0], storage_options=writer)
    run(load_project(remote))
    write_deltalake(url, days[1], mode="append", storage_options=writer)
    DeltaTable(url, storage_options=writer).optimize.compact()
    done = run(load_project(remote))
    assert done.files_read == 1     # the appended file; not the compacted one

    local = project(tmp_path / "local", "unused", "lake/", body=WITHOUT_STORAGE)
    (tmp_path / "local" / "lake").mkdir()
    shutil.copyfile(FIXTURE_LAKE / DAYS[0] / "part-0.parquet", tmp_path / "local" / "lake" / "a.parquet")
    run(load_project(local))
    shutil.copyfile(FIXTURE_LAKE / DAYS[1] / "part-0.parquet", tmp_path / "local" / "lake" / "b.parquet")
    run(load_project(local))
    windows, alerts = results(remote)
    assert windows and (windows, alerts) == results(local)


def test_an_s3_source_on_engine_spark_is_refused_at_validation_in_one_line(tmp_path, endpoint, bucket):
    """Spark's executors have no S3 connector here: the project says so before any run starts."""
    name, client = bucket
    upload(client, name, DAYS[0])
    spark = project(tmp_path, endpoint, f"s3://{name}/sessions/",
                    body="engine: spark\nspark_master: local[1]\n" + PROJECT)
    with pytest.raises(ProjectInvalid) as caught:
        load_project(spark)
    (line,) = str(caught.value).splitlines()
    assert "cannot run on engine spark" in line and f"s3://{name}/sessions/" in line, line
