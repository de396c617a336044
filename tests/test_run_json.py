"""`plimsoll run --json`: every run of one call and each check's figures in it, as the warehouse
recorded them, one JSON document on stdout whatever happened, with the documented exit codes.

The lake is three files of one day each, two sites, a session a minute; ``max_read_per_run: 1KB``
makes each file a run of its own, so one call is a backlog of three runs.
"""

from __future__ import annotations

import json
import subprocess
import threading
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pytest

from conftest import PLAIN_PROJECT, plimsoll_command, write_project, write_rows
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.outputs.runs import CHECK_FIELDS, records_json, run_with_records

T0 = datetime(2026, 11, 2)
SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, failed BOOLEAN"
CHECKS = {
    "all_failures.yml": """\
        check: all_failures
        source: sessions
        measure: {kind: rate, bad: failed}
        window: {sessions: 50, max_wait: 1h}
        baseline: {method: p_chart, history: 24, min_history: 3}
        """,
    "site_failures.yml": """\
        check: site_failures
        source: sessions
        by: [site]
        measure: {kind: rate, bad: failed}
        window: {every: 1h}
        baseline: {method: p_chart, history: 24, min_history: 3}
        """,
}


def day_rows(day: int, prefix: str = "") -> list[tuple]:
    """Six hours of day ``day``: a session a minute per site, one in ten failing."""
    return [(f"{prefix}{site}-{day}-{i}", T0 + timedelta(days=day, minutes=i), site, i % 10 == 0)
            for i in range(360) for site in ("news", "sport")]


def backlog(folder: Path, days: int = 3) -> Path:
    """The project over ``days`` files, one run each."""
    lake = folder / "lake"
    for day in range(days):
        write_rows(lake, SCHEMA, day_rows(day), f"d{day}.parquet")
    return write_project(folder, CHECKS, PLAIN_PROJECT.format(lake=lake) + "max_read_per_run: 1KB\n")


def plimsoll_run_json(project_file: Path, *args: str) -> tuple[int, dict, str]:
    """The installed command, as a scheduler runs it: exit code, the parsed stdout, stderr."""
    done = subprocess.run(plimsoll_command("run", "--json", "-p", str(project_file), *args),
                          capture_output=True, text=True, timeout=300)
    assert "Traceback" not in done.stderr, done.stderr
    return done.returncode, json.loads(done.stdout), done.stderr


def recorded(project_file: Path) -> tuple[list[dict], list[dict]]:
    """The warehouse's own rows of runs and run_checks."""
    con = duckdb.connect(str(project_file.parent / "w.duckdb"), read_only=True)
    try:
        def rows(sql: str) -> list[dict]:
            cursor = con.execute(sql)
            names = [d[0] for d in cursor.description]
            return [dict(zip(names, r)) for r in cursor.fetchall()]

        return rows("SELECT * FROM runs ORDER BY run_id"), rows("SELECT * FROM run_checks ORDER BY run_id, check_name")
    finally:
        con.close()


def test_a_backlog_prints_every_run_and_every_check_as_the_warehouse_recorded_them(tmp_path: Path) -> None:
    project_file = backlog(tmp_path)
    code, document, stderr = plimsoll_run_json(project_file)
    assert code == 0 and document["exit_code"] == 0 and document["error"] is None, stderr
    assert document["skipped_checks"] == []
    assert "[1/2] all_failures" in stderr  # progress stays on stderr
    runs, checks = recorded(project_file)
    assert [r["run_id"] for r in document["runs"]] == [r["run_id"] for r in runs] == [1, 2, 3]
    for shown, row in zip(document["runs"], runs):
        for name in ("status", "files_read", "rows_read", "rows_excluded", "duplicate_rows", "late_rows",
                     "invalid_rows", "nonfinite_values", "changed_files", "windows_written", "alerts_opened",
                     "alerts_closed", "error", "rebuild"):
            assert shown[name] == row[name], (name, shown, row)
        assert shown["checks_run"] == row["checks"] == ["all_failures", "site_failures"]
        assert shown["started_at"] == row["started_at"].isoformat(sep=" ")
        assert shown["seconds"] == round((row["finished_at"] - row["started_at"]).total_seconds(), 3)
        assert (shown["files_read"], shown["rows_read"], shown["warnings"]) == (1, 720, [])
        of_run = [c for c in checks if c["run_id"] == row["run_id"]]
        assert [c["check"] for c in shown["checks"]] == [c["check_name"] for c in of_run]
        for check, check_row in zip(shown["checks"], of_run):
            assert check["table_version"] is None   # a Parquet source (tests/test_table_sources.py: tables)
            for name in (f for f in CHECK_FIELDS[1:] if f != "table_version"):
                expected = check_row[name]
                if isinstance(expected, datetime):
                    expected = expected.isoformat(sep=" ")
                elif isinstance(expected, float):
                    expected = round(expected, 3)
                assert check[name] == expected, (name, check, check_row)
            assert check["seconds"] > 0 and check["windows_written"] > 0
        assert shown["watermarks"] == {c["check"]: c["watermark"] for c in shown["checks"]}
    # each run's watermark is its own file's last session, not the last run's
    assert [r["watermarks"]["site_failures"] for r in document["runs"]] == [
        (T0 + timedelta(days=day, minutes=359)).isoformat(sep=" ") for day in range(3)]


def test_a_check_without_new_files_is_listed_with_nothing_read_and_its_watermark(tmp_path: Path) -> None:
    project_file = backlog(tmp_path, days=1)
    run(load_project(project_file), ["site_failures"])
    records = run_with_records(project_file)
    assert records.exit_code == 0
    (only,) = records.runs
    by_check = {c["check"]: c for c in only["checks"]}
    assert by_check["all_failures"]["files_read"] == 1 and by_check["all_failures"]["windows_written"] > 0
    idle = by_check["site_failures"]
    assert all(idle[name] == 0 for name in CHECK_FIELDS if name not in ("check", "watermark", "table_version")), idle
    assert idle["watermark"] == T0 + timedelta(minutes=359)  # where its state is


def test_a_failed_run_in_a_backlog_prints_the_runs_before_it_and_its_error(tmp_path: Path) -> None:
    """The third file's column has another type: runs 1 and 2 stay committed, run 3 fails (exit 1),
    and the document says so, the error one line on stderr too, no traceback."""
    project_file = backlog(tmp_path, days=2)
    rows = [(s, t, site, "yes" if failed else "no") for s, t, site, failed in day_rows(2)]
    write_rows(tmp_path / "lake", SCHEMA.replace("failed BOOLEAN", "failed VARCHAR"), rows, "d2.parquet")
    code, document, stderr = plimsoll_run_json(project_file)
    message = f"{tmp_path / 'lake' / 'd2.parquet'}: column 'failed' is VARCHAR, but source 'sessions' has it as BOOLEAN"
    assert code == 1 and document["exit_code"] == 1
    assert document["error"].startswith(message)
    assert stderr.splitlines()[-1] == document["error"]
    assert [(r["run_id"], r["status"]) for r in document["runs"]] == [(1, "ok"), (2, "ok"), (3, "failed")]
    failed = document["runs"][2]
    assert failed["error"] == document["error"] and failed["checks"] == [] and failed["files_read"] == 0
    assert failed["finished_at"] is not None
    runs, _ = recorded(project_file)
    assert [(r["run_id"], r["status"], r["error"]) for r in runs] == [(1, "ok", None), (2, "ok", None),
                                                                      (3, "failed", failed["error"])]


def test_a_changed_check_is_listed_as_skipped_with_exit_2(tmp_path: Path) -> None:
    project_file = backlog(tmp_path, days=1)
    run(load_project(project_file))
    write_rows(tmp_path / "lake", SCHEMA, day_rows(1), "d1.parquet")
    changed = tmp_path / "checks" / "site_failures.yml"
    changed.write_text(changed.read_text().replace("every: 1h", "every: 2h"))
    code, document, stderr = plimsoll_run_json(project_file)
    assert code == 2 and document["exit_code"] == 2 and document["error"] is None
    (skipped,) = document["skipped_checks"]
    assert skipped["check"] == "site_failures" and skipped["file"].endswith("site_failures.yml")
    assert skipped["line"] == 1
    assert "plimsoll run --check site_failures --rebuild" in skipped["message"]
    assert f"{skipped['file']}:1: {skipped['message']}" in stderr
    (second,) = document["runs"]
    assert (second["run_id"], second["status"], second["checks_run"]) == (2, "ok", ["all_failures"])
    assert [c["check"] for c in second["checks"]] == ["all_failures"]

    # only the changed check: nothing runs, and the document still says why (exit 2)
    code, document, stderr = plimsoll_run_json(project_file, "--check", "site_failures")
    assert (code, document["exit_code"], document["runs"]) == (2, 2, [])
    assert [s["check"] for s in document["skipped_checks"]] == ["site_failures"]
    assert document["error"] == f"{skipped['file']}:1: {skipped['message']}"
    assert stderr.strip().splitlines()[-1] == document["error"]


def test_a_bad_project_prints_its_problems_with_exit_2(tmp_path: Path) -> None:
    project_file = backlog(tmp_path, days=1)
    check = tmp_path / "checks" / "all_failures.yml"
    check.write_text(check.read_text().replace("history: 24", "history: many"))
    code, document, stderr = plimsoll_run_json(project_file)
    assert (code, document["exit_code"], document["runs"], document["skipped_checks"]) == (2, 2, [], [])
    assert "all_failures.yml:5: " in document["error"] and document["error"] in stderr
    assert not (tmp_path / "w.duckdb").exists()


def test_a_warehouse_held_by_another_run_is_exit_1_with_the_holder_named(tmp_path: Path) -> None:
    project_file = backlog(tmp_path, days=1)
    holding, release = threading.Event(), threading.Event()

    def pause(message: str) -> None:
        if message.startswith("[1/2]") and not holding.is_set():
            holding.set()
            assert release.wait(120)

    worker = threading.Thread(target=run, args=(load_project(project_file),), kwargs={"progress": pause})
    worker.start()
    try:
        assert holding.wait(120)
        code, document, stderr = plimsoll_run_json(project_file, "--wait", "0.2")
    finally:
        release.set()
        worker.join()
    assert (code, document["exit_code"], document["runs"]) == (1, 1, [])
    assert "in use by run 1 (pid " in document["error"] and document["error"] in stderr


def test_warnings_are_in_the_document(tmp_path: Path) -> None:
    """A file rewritten after it was read, and a session whose event time cannot be right."""
    project_file = backlog(tmp_path, days=1)
    run(load_project(project_file))
    write_rows(tmp_path / "lake", SCHEMA, day_rows(0) + [("x", T0, "news", False)], "d0.parquet")
    write_rows(tmp_path / "lake", SCHEMA, day_rows(1) + [("beacon", datetime(2099, 1, 1), "news", True)],
               "d1.parquet")
    code, document, stderr = plimsoll_run_json(project_file)
    assert code == 0, stderr
    (second,) = document["runs"]
    *changed, impossible = second["warnings"]
    assert [w.startswith(f"lake file changed after it was read; not read again: {tmp_path / 'lake' / 'd0.parquet'}")
            and f"(check {name}: size " in w for w, name in zip(changed, ("all_failures", "site_failures"))] == [True] * 2
    assert "d1.parquet: 1 session with an impossible event time" in impossible
    assert second["changed_files"] == 1 and second["invalid_rows"] == 1
    for warning in second["warnings"]:
        assert f"warning: {warning}" in stderr


def test_the_document_is_json_without_nan_and_times_as_text(tmp_path: Path) -> None:
    records = run_with_records(backlog(tmp_path, days=1))
    text = records_json(records)
    document = json.loads(text)
    assert list(document) == ["exit_code", "error", "skipped_checks", "runs"]
    (only,) = document["runs"]
    assert set(only) >= {"run_id", "status", "started_at", "finished_at", "seconds", "files_read", "rows_read",
                         "late_rows", "invalid_rows", "duplicate_rows", "windows_written", "alerts_opened",
                         "alerts_closed", "watermarks", "warnings", "checks", "error"}
    datetime.fromisoformat(only["started_at"]) and datetime.fromisoformat(only["checks"][0]["watermark"])


@pytest.mark.parametrize("args", [(), ("--json",)], ids=["text", "json"])
def test_each_check_records_the_seconds_its_stages_took(tmp_path: Path, args: tuple[str, ...]) -> None:
    project_file = backlog(tmp_path, days=1)
    done = subprocess.run(plimsoll_command("run", "-p", str(project_file), *args), capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    _, checks = recorded(project_file)
    assert all(0 < c["seconds"] < 300 for c in checks), checks
