"""Values real lakes hold that must not blind or mislead a check.

- An event time that cannot be right (2099, `infinity`) is invalid, its file named, and never
  moves the watermark; times before 1970 fall into their own window.
- NaN and ±infinity in measure inputs are missing and counted, never a breach, never in JSON.
- A window without a value (a zero denominator) gives no verdict: it cannot close an alert.
- Every timestamp type Parquet writers produce is an event time, and so is an expression over
  columns (epoch milliseconds, ISO text).
- One file whose column changed type is named by the run that reads it (exit 1), not blamed on a
  check file; a removed source's column types are forgotten.
- Partition folders that contradict a file's own column are refused, the path named.
"""

from __future__ import annotations

import json
import math
import subprocess
from datetime import datetime, timedelta
from pathlib import Path

import duckdb
import pandas as pd
import pytest
from click.testing import CliRunner
from conftest import PLAIN_PROJECT, plimsoll_command, write_project, write_rows

from toolkit.cli import main
from toolkit.problems import DataError
from toolkit.config.project import load_project
from toolkit.engine.runner import run

T0 = datetime(2026, 11, 2)
SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, failed BOOLEAN"
HOURLY = """\
check: site_hours
source: sessions
by: [site]
measure: {kind: rate, bad: failed}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 12, min_history: 3, factor: 2, floor: 0.2}
guard: {min_sessions: 5, min_bad: 2}
"""


def hours(first: int, last: int, site: str = "news", prefix: str = "s") -> list[tuple]:
    """Ten sessions an hour, one in ten failed."""
    return [(f"{prefix}{h}-{i}", T0 + timedelta(hours=h, minutes=5 * i + 1), site, i == 0)
            for h in range(first, last) for i in range(10)]


def query(project_file: Path, sql: str, **params: object) -> list[tuple]:
    con = duckdb.connect(str(project_file.parent / "w.duckdb"), read_only=True)
    try:
        return con.execute(sql, params).fetchall()
    finally:
        con.close()


def windows(project_file: Path) -> list[tuple]:
    return query(project_file, "SELECT key_text, window_start, window_end, sessions, bad, breach FROM windows "
                               "ORDER BY key_text, window_number")


def lake_project(folder: Path, checks: dict[str, str], schema: str, files: dict[str, list[tuple]],
                 extra: str = "") -> Path:
    for name, rows in files.items():
        path = folder / "lake" / name
        write_rows(path.parent, schema, rows, path.name)
    return write_project(folder, checks, PLAIN_PROJECT.format(lake=folder / "lake") + extra)


# ----------------------------------------------------------------------------------------------
# Impossible event times


@pytest.mark.parametrize("impossible", ["TIMESTAMP '2099-01-01 00:00:00'", "'infinity'::TIMESTAMP"])
def test_one_beacon_with_a_broken_clock_does_not_blind_the_check(tmp_path: Path, impossible: str) -> None:
    # a clean lake, and the same lake with one impossible session among the second day's
    clean = lake_project(tmp_path / "clean", {"h.yml": HOURLY}, SCHEMA, {"1.parquet": hours(0, 24)})
    broken = lake_project(tmp_path / "broken", {"h.yml": HOURLY}, SCHEMA, {"1.parquet": hours(0, 24)})
    run(load_project(clean))
    run(load_project(broken))
    write_rows(tmp_path / "clean" / "lake", SCHEMA, hours(24, 36), "2.parquet")
    write_rows(tmp_path / "broken" / "lake", SCHEMA, hours(24, 36), "2.parquet")
    con = duckdb.connect()
    con.execute(f"COPY (SELECT 'beacon' AS session_id, {impossible} AS ended_at, 'news' AS site, true AS failed) "
                f"TO '{tmp_path / 'broken' / 'lake' / '3.parquet'}' (FORMAT parquet)")
    con.close()
    run(load_project(clean))
    result = CliRunner().invoke(main, ["run", "-p", str(broken)])
    assert result.exit_code == 0, result.output
    assert (f"warning: source sessions: 3.parquet: 1 session with an impossible event time (not finite, or "
            "more than max_future 1 day after the file was written) counted as invalid") in result.output
    # later sessions still land in windows that close: nothing is late, the windows are the clean ones
    for folder in (clean, broken):
        write_rows(folder.parent / "lake", SCHEMA, hours(36, 48), "4.parquet")
        run(load_project(folder))
    assert windows(broken) == windows(clean) and len(windows(clean)) == 47
    assert query(broken, "SELECT sum(invalid_rows), sum(late_rows) FROM runs") == [(1, 0)]
    assert query(broken, "SELECT max(watermark) FROM run_checks") == query(clean, "SELECT max(watermark) FROM run_checks")
    assert query(broken, "SELECT path, invalid_rows FROM files_read WHERE invalid_rows > 0") == [("3.parquet", 1)]


def test_a_session_before_1970_falls_into_its_own_window(tmp_path: Path) -> None:
    rows = [("old-1", datetime(1969, 12, 31, 23, 30), "news", False),
            ("old-2", datetime(1969, 12, 31, 23, 59, 59), "news", True),
            ("new-1", datetime(1970, 1, 1, 0, 30), "news", False),
            ("closer", datetime(1970, 1, 1, 5, 0), "news", False)]
    project_file = lake_project(tmp_path, {"h.yml": HOURLY}, SCHEMA, {"1.parquet": rows})
    run(load_project(project_file))
    assert [w[1:4] for w in windows(project_file)] == [
        (datetime(1969, 12, 31, 23), datetime(1970, 1, 1, 0), 2),
        (datetime(1970, 1, 1, 0), datetime(1970, 1, 1, 1), 1)]


# ----------------------------------------------------------------------------------------------
# Non-finite measure inputs and windows without a value

RATIO_SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, rebuffer_ms DOUBLE, play_ms DOUBLE"
REBUFFERING = """\
check: rebuffering
source: sessions
by: [site]
measure: {kind: ratio, numerator: rebuffer_ms, denominator: play_ms + rebuffer_ms}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 12, min_history: 3, factor: 2, floor: 0.02}
guard: {min_sessions: 5}
lifecycle: {recover_after: 1, expire_after: 7d}
"""


def playing(first: int, last: int, rebuffer: float = 10.0, play: float = 990.0) -> list[tuple]:
    return [(f"p{h}-{i}", T0 + timedelta(hours=h, minutes=5 * i + 1), "news", rebuffer, play)
            for h in range(first, last) for i in range(10)]


def test_nan_and_infinity_in_measure_inputs_are_missing_counted_and_never_a_breach(tmp_path: Path) -> None:
    rows = playing(0, 12)
    rows[100] = (rows[100][0], rows[100][1], "news", math.nan, 990.0)         # hour 10
    rows[111] = (rows[111][0], rows[111][1], "news", 10.0, math.inf)         # hour 11
    rows += [("closer", T0 + timedelta(hours=14), "news", 10.0, 990.0)]
    project_file = lake_project(tmp_path, {"r.yml": REBUFFERING}, RATIO_SCHEMA, {"1.parquet": rows})
    run(load_project(project_file))
    found = query(project_file, "SELECT window_number - min(window_number) OVER (), sessions, value, breach FROM windows ORDER BY window_number")
    assert [w[0] for w in found] == list(range(12))
    assert all(w[2] == pytest.approx(0.01) and not w[3] for w in found)     # the rest of hour 10 and 11 as usual
    assert query(project_file, "SELECT nonfinite_values FROM runs") == [(2,)]
    assert query(project_file, "SELECT count(*) FROM alerts") == [(0,)]


def test_listings_never_print_non_finite_json(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path, {"r.yml": REBUFFERING}, RATIO_SCHEMA,
                                {"1.parquet": playing(0, 6) + playing(6, 8, rebuffer=200.0)
                                 + [("closer", T0 + timedelta(hours=9), "news", 1.0, 1.0)]})
    run(load_project(project_file))
    con = duckdb.connect(str(tmp_path / "w.duckdb"))
    con.execute("UPDATE alerts SET peak_value = 'NaN'::DOUBLE, threshold = 'Infinity'::DOUBLE")  # as an older release kept them
    con.close()
    result = CliRunner().invoke(main, ["alerts", "-p", str(project_file), "--json"])
    assert result.exit_code == 0, result.output

    def refuse(constant: str) -> None:
        raise ValueError(f"non-finite JSON: {constant}")

    (alert,) = json.loads(result.output, parse_constant=refuse)
    assert alert["peak_value"] is None and alert["threshold"] is None


def test_a_window_without_a_value_gives_no_verdict_and_cannot_close_an_alert(tmp_path: Path) -> None:
    # hours 6-7 rebuffer badly (an alert opens); hour 8 is a total outage: nothing played, the
    # ratio's denominator is 0; hour 9 is still bad; hour 10 recovers
    rows = (playing(0, 6) + playing(6, 8, rebuffer=200.0) + playing(8, 9, rebuffer=0.0, play=0.0)
            + playing(9, 10, rebuffer=200.0) + playing(10, 11) + [("closer", T0 + timedelta(hours=12), "news", 1.0, 1.0)])
    project_file = lake_project(tmp_path, {"r.yml": REBUFFERING}, RATIO_SCHEMA, {"1.parquet": rows})
    run(load_project(project_file))
    found = query(project_file, "SELECT value IS NULL, threshold IS NOT NULL, breach FROM windows ORDER BY window_number")
    assert found[8] == (True, True, None)   # no value: no verdict (breach NULL)
    assert query(project_file, "SELECT breach_windows, close_reason, closed_at FROM alerts") == [
        (3, "recovered", T0 + timedelta(hours=11))]


# ----------------------------------------------------------------------------------------------
# Timestamp types and event-time expressions


def test_every_parquet_timestamp_type_and_an_expression_is_an_event_time(tmp_path: Path) -> None:
    rows = hours(0, 30)
    frame = pd.DataFrame(rows, columns=["session_id", "ended_at", "site", "failed"])
    reference = lake_project(tmp_path / "naive", {"h.yml": HOURLY}, SCHEMA, {"1.parquet": rows})
    run(load_project(reference))
    expected = windows(reference)
    assert len(expected) == 29
    variants = {
        # pandas' datetime64[ns, UTC], which DuckDB reads as TIMESTAMPTZ_NS
        "ns_utc": (frame.assign(ended_at=frame.ended_at.dt.tz_localize("UTC").astype("datetime64[ns, UTC]")), "ended_at"),
        # the same instants written in another zone are the same data time
        "ns_tokyo": (frame.assign(ended_at=frame.ended_at.dt.tz_localize("UTC").dt.tz_convert("Asia/Tokyo")), "ended_at"),
        "ms": (frame.assign(ended_at=frame.ended_at.astype("datetime64[ms]")), "ended_at"),
        "epoch_ms": (frame.assign(ended_ms=frame.ended_at.astype("datetime64[ms]").astype("int64")).drop(
            columns="ended_at"), "epoch_ms(ended_ms)"),
        "iso_text": (frame.assign(ended_iso=frame.ended_at.dt.strftime("%Y-%m-%dT%H:%M:%S")).drop(
            columns="ended_at"), "ended_iso::TIMESTAMP"),
    }
    for name, (data, event_time) in variants.items():
        folder = tmp_path / name
        (folder / "lake").mkdir(parents=True)
        data.to_parquet(folder / "lake" / "1.parquet")
        text = PLAIN_PROJECT.format(lake=folder / "lake").replace("event_time: ended_at", f"event_time: {event_time}")
        project_file = write_project(folder, {"h.yml": HOURLY}, text)
        check = CliRunner().invoke(main, ["validate", "-p", str(project_file)])
        assert check.exit_code == 0, f"{name}: {check.output}"
        run(load_project(project_file))
        assert windows(project_file) == expected, name


def test_an_event_time_that_is_not_a_time_is_named_with_its_line(tmp_path: Path) -> None:
    text = PLAIN_PROJECT.replace("event_time: ended_at", "event_time: site")
    project_file = lake_project(tmp_path, {"h.yml": HOURLY}, SCHEMA, {"1.parquet": hours(0, 2)})
    (tmp_path / "plimsoll.yml").write_text(text.format(lake=tmp_path / "lake"))
    result = CliRunner().invoke(main, ["validate", "-p", str(project_file)])
    assert result.exit_code == 2
    assert "plimsoll.yml:6: sources.sessions.event_time: column 'site' is VARCHAR, not a timestamp" in result.output


# ----------------------------------------------------------------------------------------------
# Column types across files, and removed sources


def test_one_file_that_changed_a_columns_type_is_named_by_the_run_with_exit_1(tmp_path: Path) -> None:
    schema = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, failed BOOLEAN, startup_ms INTEGER"
    quantile = ("check: startup\nsource: sessions\nby: [site]\nmeasure: {kind: quantile, of: startup_ms, q: 0.5}\n"
                "window: {every: 1h}\nbaseline: {method: rolling_percentile, q: 0.5, history: 5, min_history: 2}\n")
    rows = [(*r, 900) for r in hours(0, 6)]
    project_file = lake_project(tmp_path, {"q.yml": quantile}, schema, {"a.parquet": rows})
    first = subprocess.run(plimsoll_command("run", "-p", str(project_file)), capture_output=True, text=True)
    assert first.returncode == 0, first.stderr
    write_rows(tmp_path / "lake", schema.replace("startup_ms INTEGER", "startup_ms VARCHAR"),
               [(*r, "900 ms") for r in hours(6, 8)], "b.parquet")
    second = subprocess.run(plimsoll_command("run", "-p", str(project_file)), capture_output=True, text=True)
    assert second.returncode == 1, second.stdout + second.stderr
    lines = [line for line in second.stderr.splitlines() if not line[:4].isdigit()]  # progress lines aside
    assert lines == [f"{tmp_path / 'lake' / 'b.parquet'}: column 'startup_ms' is VARCHAR, but source 'sessions' "
                     "has it as INTEGER (first read in a.parquet)"]
    assert query(project_file, "SELECT status FROM runs ORDER BY run_id") == [("ok",), ("failed",)]


def test_a_removed_source_forgets_its_column_types(tmp_path: Path) -> None:
    two = PLAIN_PROJECT + "  extra:\n    path: {extra}\n    session_id: session_id\n    event_time: ended_at\n"
    extra_check = HOURLY.replace("check: site_hours", "check: extra_hours").replace("source: sessions", "source: extra")
    write_rows(tmp_path / "extra", SCHEMA.replace("failed BOOLEAN", "failed INTEGER"),
               [(s, t, site, int(bad)) for s, t, site, bad in hours(0, 4)], "x.parquet")
    project_file = lake_project(tmp_path, {"h.yml": HOURLY, "x.yml": extra_check.replace("bad: failed", "bad: failed = 1")},
                               SCHEMA, {"1.parquet": hours(0, 4)})
    (tmp_path / "plimsoll.yml").write_text(two.format(lake=tmp_path / "lake", extra=tmp_path / "extra"))
    run(load_project(project_file))
    assert ("extra", "failed", "INTEGER") in query(project_file, "SELECT source_name, column_name, column_type FROM source_columns")
    # the source and its check go; later a source of that name comes back over other files
    (tmp_path / "checks" / "x.yml").unlink()
    (tmp_path / "plimsoll.yml").write_text(PLAIN_PROJECT.format(lake=tmp_path / "lake"))
    run(load_project(project_file))
    assert [r[0] for r in query(project_file, "SELECT DISTINCT source_name FROM source_columns")] == ["sessions"]
    write_rows(tmp_path / "extra2", SCHEMA, hours(0, 4), "y.parquet")
    (tmp_path / "plimsoll.yml").write_text(two.format(lake=tmp_path / "lake", extra=tmp_path / "extra2"))
    (tmp_path / "checks" / "x.yml").write_text(extra_check)
    assert run(load_project(project_file)).status == "ok"


# ----------------------------------------------------------------------------------------------
# Partition folders that say otherwise than the files


def test_a_partition_folder_that_contradicts_the_files_column_is_refused(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path, {"h.yml": HOURLY}, SCHEMA, {"site=news/1.parquet": hours(0, 4, site="news")})
    run(load_project(project_file))
    # files under site=news/ whose own column says sport
    write_rows(tmp_path / "lake" / "site=news", SCHEMA, hours(4, 8, site="sport", prefix="x"), "2.parquet")
    with pytest.raises(DataError) as caught:
        run(load_project(project_file, check_schema=False))
    assert str(caught.value) == (
        f"{tmp_path / 'lake' / 'site=news' / '2.parquet'}: partition folder 'site=news' contradicts the file's "
        "own column 'site' (40 sessions say 'sport'); fix the file or the folder, so no session is counted under "
        "the wrong value")
    assert query(project_file, "SELECT status FROM runs ORDER BY run_id") == [("ok",), ("failed",)]


def test_a_partition_folder_named_after_the_event_time_is_refused(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path, {"h.yml": HOURLY}, SCHEMA, {"ended_at=2026-11-02/1.parquet": hours(0, 4)})
    with pytest.raises(DataError, match=r"ended_at=2026-11-02/1.parquet: partition folder 'ended_at=2026-11-02' is "
                                        "named after the event-time column 'ended_at'"):
        run(load_project(project_file, check_schema=False))


def test_a_partition_folder_that_agrees_with_the_files_column_is_read(tmp_path: Path) -> None:
    project_file = lake_project(tmp_path, {"h.yml": HOURLY}, SCHEMA,
                                {"site=news/1.parquet": hours(0, 4), "site=sport/1.parquet": hours(0, 4, "sport", "y")})
    run(load_project(project_file))
    assert {w[0] for w in windows(project_file)} == {"site=news", "site=sport"}


SPLIT_SCHEMA = "session_id VARCHAR, ended_at TIMESTAMP, site VARCHAR, error_code VARCHAR"
HOURLY_BY_CODE = """\
check: codes
source: sessions
by: [site]
measure: {kind: rate, bad: error_code IS NOT NULL, split: error_code}
window: {every: 1h}
baseline: {method: rolling_percentile, q: 0.5, history: 5, min_history: 2}
"""


def test_an_error_code_seen_in_an_earlier_run_keeps_its_series_before_1970(tmp_path: Path) -> None:
    # A split value seen in an earlier run has a row in every later window of its key, 0 where it
    # had no bad session: before 1970 too, where window numbers are negative.
    start = datetime(1969, 12, 1)
    first = [(f"a{i}", start + timedelta(hours=i // 5, minutes=i % 5), "kids", "E" if i == 3 else None)
             for i in range(50)]
    later = [(f"b{i}", start + timedelta(hours=10 + i // 5, minutes=i % 5), "kids", None) for i in range(50)]
    apart = lake_project(tmp_path / "apart", {"c.yml": HOURLY_BY_CODE}, SPLIT_SCHEMA, {"1.parquet": first})
    run(load_project(apart))
    write_rows(tmp_path / "apart" / "lake", SPLIT_SCHEMA, later, "2.parquet")
    run(load_project(apart))
    together = lake_project(tmp_path / "together", {"c.yml": HOURLY_BY_CODE}, SPLIT_SCHEMA,
                            {"1.parquet": first, "2.parquet": later})
    run(load_project(together))
    shown = ("SELECT split_value, window_number, window_start, sessions, bad, value FROM windows "
             "ORDER BY split_value NULLS FIRST, window_number")
    assert query(apart, shown) == query(together, shown)
    assert query(apart, "SELECT count(*), max(window_start) FROM windows WHERE split_value = 'E'") == [
        (19, datetime(1969, 12, 1, 18))]
