"""The demo scenario generator, end to end over the Parquet lake it writes.

The session's shared 300,000-session lake (tests/conftest.py) is read; every labelled incident
must stand out in plain SQL over the written files, the decoys must look as labelled, and everything
else must stay stationary. Expected labels are copied here from the scenario brief, not read from the generator.
"""

from __future__ import annotations

import re
from datetime import datetime
from pathlib import Path

import duckdb
import pytest

from toolkit.problems import DataError
from toolkit.sql.quoting import quote_literal
from toolkit.warehouse_demo import generate
from toolkit.warehouse_demo.generate import Label, build_lake, read_labels

SESSIONS = 300_000  # the shared lake's size (conftest.SHARED_LAKE)
SMALL = 50_000
SEED = 7
T = datetime.fromisoformat
EXPECTED_LABELS = [
    ("decoy", "*", "site=news", T("2026-11-09 03:00"), T("2026-11-09 04:00")),
    ("incident", "startup_time_by_device", "device_family=smart_tv",
     T("2026-11-12 06:00"), T("2026-11-13 18:00")),
    ("decoy", "*", "title_id=t-3002", T("2026-11-14 10:00"), T("2026-11-14 11:00")),
    ("incident", "cdn_country_errors", "cdn=birch, country=DE",
     T("2026-11-16 14:00"), T("2026-11-16 17:00")),
    ("incident", "title_errors", "site=kids, title_id=t-3001",
     T("2026-11-17 12:00"), T("2026-11-19 12:00")),
    ("incident", "release_errors_against_peers", "device_family=android, player_version=8.4.0",
     T("2026-11-19 15:00"), T("2026-11-21 00:00")),
    ("incident", "rebuffering_by_site", "site=sport", T("2026-11-20 19:00"), T("2026-11-20 22:00")),
]
SCHEMA = [
    ("session_id", "VARCHAR"), ("viewer_id", "VARCHAR"), ("started_at", "TIMESTAMP"),
    ("ended_at", "TIMESTAMP"), ("site", "VARCHAR"), ("title_id", "VARCHAR"),
    ("is_live", "BOOLEAN"), ("cdn", "VARCHAR"), ("country", "VARCHAR"),
    ("device_family", "VARCHAR"), ("player_version", "VARCHAR"), ("user_agent", "VARCHAR"),
    ("is_bot", "BOOLEAN"), ("startup_ms", "INTEGER"), ("error_code", "VARCHAR"),
    ("play_ms", "BIGINT"), ("rebuffer_ms", "BIGINT"), ("pause_ms", "BIGINT"),
    ("bitrate_kbps", "DOUBLE"), ("day", "DATE"),
]
ERROR_CODES = {
    "NET-TIMEOUT", "DRM-LICENSE", "DECODE-ERR", "MANIFEST-404", "CDN-5XX", "PLAYER-CRASH",
}
CRAWLER = "regexp_matches(lower(user_agent), 'bot|crawler|spider')"
FAILED = "(error_code IS NOT NULL)::INT"
REBUFFERING = "sum(rebuffer_ms) / sum(play_ms + rebuffer_ms)"


def sessions_glob(workdir: Path) -> str:
    return str(workdir / "lake" / "sessions" / "*" / "*.parquet")


def open_lake(workdir: Path) -> duckdb.DuckDBPyConnection:
    """Views over the lake: ``s`` is every row, ``people`` leaves out every crawler."""
    con = duckdb.connect()
    source = f"read_parquet({quote_literal(sessions_glob(workdir))}, hive_partitioning = true)"
    con.execute(f"CREATE VIEW s AS SELECT * FROM {source}")
    con.execute(f"CREATE VIEW people AS SELECT * FROM s WHERE NOT is_bot AND NOT {CRAWLER}")
    return con


def checksum(con: duckdb.DuckDBPyConnection, relation: str) -> str:
    """md5 over every row, in a total order, so that equal sums mean equal data."""
    return con.execute(
        f"SELECT md5(string_agg(r::VARCHAR, chr(10) ORDER BY r.ended_at, r.session_id)) "
        f"FROM {relation} AS r"
    ).fetchone()[0]


def one(con: duckdb.DuckDBPyConnection, sql: str) -> object:
    return con.execute(sql).fetchone()[0]


@pytest.fixture(scope="module")
def built(fernhill_lake) -> tuple[Path, list[Label]]:
    """The session's shared demo lake: the folder build_lake wrote and the labels it returned."""
    assert fernhill_lake.sessions == SESSIONS
    return fernhill_lake.folder, list(fernhill_lake.labels)


@pytest.fixture(scope="module")
def con(built: tuple[Path, list[Label]]) -> duckdb.DuckDBPyConnection:
    connection = open_lake(built[0])
    yield connection
    connection.close()


# --- labels --------------------------------------------------------------------------------------


def test_labels_are_the_scenario(built: tuple[Path, list[Label]]) -> None:
    workdir, labels = built
    assert [(lab.kind, lab.check, lab.key, lab.start, lab.end) for lab in labels] == EXPECTED_LABELS
    assert all(lab.note for lab in labels)
    assert read_labels(workdir / "labels.csv") == labels


def test_labels_csv_format(built: tuple[Path, list[Label]]) -> None:
    lines = (built[0] / "labels.csv").read_text(encoding="utf-8").splitlines()
    assert lines[0] == "kind,check,key,start,end,note"
    assert len(lines) == 1 + len(EXPECTED_LABELS)
    assert re.search(r",2026-11-16 14:00:00,2026-11-16 17:00:00,", lines[4])


HEADER = "kind,check,key,start,end,note\n"
HOUR = "2026-11-02 00:00:00,2026-11-02 01:00:00"


@pytest.mark.parametrize(
    "body, message",
    [
        ("kind,check,key,start\n", ":1: expected the header"),
        (HEADER + "incident,x,a=b,2026-11-02 00:00:00\n", ":2: expected 6 fields"),
        (HEADER + f"bug,x,a=b,{HOUR},n\n", ":2: kind must be"),
        (HEADER + f"incident,*,a=b,{HOUR},n\n", ":2: a decoy has check"),
        (HEADER + f"incident,x,a,{HOUR},n\n", ":2: key"),
        (HEADER + "incident,x,a=b,2026-11-02T00:00,2026-11-02 01:00:00,n\n", ":2: start"),
        (HEADER + "incident,x,a=b,2026-11-02 01:00:00,2026-11-02 01:00:00,n\n", ":2: end"),
    ],
)
def test_read_labels_names_file_and_line(tmp_path: Path, body: str, message: str) -> None:
    path = tmp_path / "labels.csv"
    path.write_text(body, encoding="utf-8")
    with pytest.raises(DataError, match=re.escape(message)) as caught:
        read_labels(path)
    assert str(path) in str(caught.value)


def test_label_key_pairs() -> None:
    label = Label("incident", "cdn_country_errors", "cdn=birch, country=DE", T("2026-11-16 14:00"),
                  T("2026-11-16 17:00"), "")
    assert label.key_pairs() == {"cdn": "birch", "country": "DE"}


# --- arguments, determinism, replacement --------------------------------------------------------


@pytest.mark.parametrize("sessions", [0, 19_999, 2.5e6, True])
def test_refuses_bad_sizes_and_writes_nothing(tmp_path: Path, sessions: object) -> None:
    with pytest.raises(ValueError, match="sessions"):
        build_lake(tmp_path, sessions=sessions)  # type: ignore[arg-type]
    assert list(tmp_path.iterdir()) == []


def generated_checksum(seed: int, threads: int) -> str:
    """The checksum of the rows lake.sql generates, straight from DuckDB (nothing written)."""
    with duckdb.connect() as c:
        c.execute(f"SET threads = {threads}")
        c.execute("SET enable_progress_bar = false")
        generate.run_script(c, {"seed": seed, "sessions": SMALL})
        return checksum(c, "sessions")


def test_same_data_whatever_the_thread_count() -> None:
    assert len({generated_checksum(SEED, threads) for threads in (1, 2, 3)}) == 1


def test_same_seed_same_lake_other_seed_other_lake(tmp_path: Path) -> None:
    build_lake(tmp_path, sessions=SMALL, seed=SEED + 1)
    with open_lake(tmp_path) as other:
        other_sum = checksum(other, "s")
    build_lake(tmp_path, sessions=SMALL, seed=SEED)  # over the other lake: replaces it
    with open_lake(tmp_path) as again:
        assert checksum(again, "s") == generated_checksum(SEED, 2) != other_sum
    assert sorted(p.name for p in tmp_path.iterdir()) == ["labels.csv", "lake"]


# --- layout and schema ---------------------------------------------------------------------------


def test_schema(con: duckdb.DuckDBPyConnection) -> None:
    assert [(name, kind) for name, kind, *_ in con.execute("DESCRIBE s").fetchall()] == SCHEMA


def test_hive_layout_one_folder_per_day(built: tuple[Path, list[Label]], con) -> None:
    folders = sorted(p.name for p in (built[0] / "lake" / "sessions").iterdir())
    assert folders == [f"day=2026-11-{d:02d}" for d in range(2, 23)]
    assert all(list((built[0] / "lake" / "sessions" / f).glob("*.parquet")) for f in folders)
    assert one(con, "SELECT count(*) FROM s WHERE day <> ended_at::DATE") == 0
    columns = con.execute(
        f"SELECT DISTINCT name FROM parquet_schema({quote_literal(sessions_glob(built[0]))})"
    ).fetchall()
    assert ("day",) not in columns


def test_each_file_is_in_ended_at_order(built: tuple[Path, list[Label]], con) -> None:
    out_of_order = one(con, f"""
        SELECT count(*) FROM (
            SELECT ended_at < lag(ended_at) OVER (PARTITION BY filename ORDER BY file_row_number)
                       AS back
            FROM read_parquet({quote_literal(sessions_glob(built[0]))}, filename = true,
                              file_row_number = true))
        WHERE back""")
    assert out_of_order == 0


def test_row_count_and_time_range(con: duckdb.DuckDBPyConnection) -> None:
    count, first, last = con.execute(
        "SELECT count(*), min(ended_at), max(ended_at) FROM s").fetchone()
    assert abs(count - SESSIONS) <= SESSIONS // 100
    assert T("2026-11-02 00:00") <= first < T("2026-11-02 00:10")
    assert T("2026-11-22 23:50") < last <= T("2026-11-22 23:59:59.999")


def test_identifiers(con: duckdb.DuckDBPyConnection) -> None:
    rows, sessions, bad = con.execute(r"""
        SELECT count(*), count(DISTINCT session_id),
               count(*) FILTER (WHERE NOT regexp_full_match(session_id, 's[0-9a-f]{16}')
                                   OR NOT regexp_full_match(viewer_id, 'v[0-9a-f]{16}'))
        FROM s""").fetchone()
    assert sessions == rows and bad == 0
    per_viewer, ambiguous = con.execute("""
        SELECT count(*) / count(DISTINCT viewer_id),
               (SELECT count(*) FROM (SELECT viewer_id FROM people GROUP BY viewer_id
                                      HAVING count(DISTINCT (country, device_family)) > 1))
        FROM people""").fetchone()
    assert per_viewer > 3  # a viewer has several sessions
    assert ambiguous == 0  # and one id never stands for two viewers


# --- session model -------------------------------------------------------------------------------


def test_every_session_is_started_or_start_failure_or_exit(con: duckdb.DuckDBPyConnection) -> None:
    total, started, failed_start, exited, bad = con.execute("""
        SELECT count(*),
               count(*) FILTER (WHERE startup_ms IS NOT NULL),
               count(*) FILTER (WHERE startup_ms IS NULL AND error_code IS NOT NULL),
               count(*) FILTER (WHERE startup_ms IS NULL AND error_code IS NULL),
               count(*) FILTER (WHERE startup_ms IS NULL
                                  AND (play_ms <> 0 OR rebuffer_ms <> 0 OR bitrate_kbps IS NOT NULL)
                                   OR startup_ms IS NOT NULL AND bitrate_kbps IS NULL
                                   OR ended_at < started_at)
        FROM s""").fetchone()
    assert started + failed_start + exited == total and bad == 0
    codes = {row[0] for row in con.execute("SELECT DISTINCT error_code FROM s").fetchall()}
    assert codes - {None} == ERROR_CODES


def test_durations_add_up(con: duckdb.DuckDBPyConnection) -> None:
    assert one(con, """
        SELECT count(*) FROM s
        WHERE startup_ms IS NOT NULL
          AND epoch_ms(ended_at) - epoch_ms(started_at)
              <> startup_ms + play_ms + rebuffer_ms + pause_ms""") == 0


def test_audience_rates(con: duckdb.DuckDBPyConnection) -> None:
    fatal, exits, startup, rebuffering = con.execute(f"""
        SELECT avg({FAILED}),
               avg((startup_ms IS NULL AND error_code IS NULL)::INT),
               median(startup_ms),
               {REBUFFERING}
        FROM people WHERE ended_at < '2026-11-09'""").fetchone()
    assert 0.010 <= fatal <= 0.016
    assert 0.02 <= exits <= 0.03
    assert 800 <= startup <= 1000
    assert 0.004 <= rebuffering <= 0.008


def test_mix_of_sites_cdns_countries_and_devices(con: duckdb.DuckDBPyConnection) -> None:
    shares = dict(con.execute(
        "SELECT site, count(*) / sum(count(*)) OVER () FROM people GROUP BY site").fetchall())
    assert shares == pytest.approx({"news": 0.45, "kids": 0.25, "sport": 0.30}, abs=0.02)
    cdns = dict(con.execute(
        "SELECT cdn, count(*) / sum(count(*)) OVER () FROM people GROUP BY cdn").fetchall())
    assert set(cdns) == {"alder", "birch", "cedar", "rowan"}
    assert max(cdns.values()) > 2.5 * min(cdns.values())
    countries = [c for c, in con.execute(
        "SELECT country FROM people GROUP BY country ORDER BY count(*) DESC").fetchall()]
    assert 35 <= len(countries) <= 45 and "DE" in countries[:3]
    assert one(con, "SELECT avg((cdn = 'birch' AND country = 'DE')::INT) FROM people") >= 0.03
    families = dict(con.execute("""
        SELECT device_family, count(DISTINCT player_version) FROM people GROUP BY 1""").fetchall())
    assert set(families) == {"web", "ios", "android", "smart_tv", "console", "set_top_box"}
    assert all(2 <= n <= 4 for n in families.values())
    assert one(con, "SELECT median(startup_ms) FILTER (WHERE device_family = 'smart_tv') "
                    "/ median(startup_ms) FILTER (WHERE device_family = 'web') FROM people") > 1.3


def test_titles_are_a_long_tail_with_live_channels(con: duckdb.DuckDBPyConnection) -> None:
    catalogue, top_share, live_sites = con.execute("""
        WITH t AS (SELECT title_id, count(*) AS n FROM people
                   WHERE title_id <= 't-3000' GROUP BY title_id)
        SELECT count(*), max(n) / sum(n),
               (SELECT list(DISTINCT site ORDER BY site) FROM people WHERE is_live)
        FROM t""").fetchone()
    assert catalogue > 2500  # nearly every catalogue title is watched at all
    assert 0.04 < top_share < 0.15
    assert live_sites == ["news", "sport"]
    sites_per_title = one(
        con, "SELECT max(n) FROM (SELECT count(DISTINCT site) AS n FROM people GROUP BY title_id)")
    assert sites_per_title == 1


def test_user_agents_and_bot_flags(con: duckdb.DuckDBPyConnection) -> None:
    unlike_player = one(con, """
        SELECT count(*) FROM people
        WHERE NOT starts_with(user_agent, 'FernhillPlayer/' || player_version || ' ('
                                          || device_family || '; ')""")
    assert unlike_player == 0
    assert one(con, f"SELECT count(*) FROM s WHERE is_bot AND NOT {CRAWLER}") == 0
    flagged, unflagged = con.execute(
        "SELECT count(*) FILTER (WHERE is_bot), count(*) FILTER (WHERE NOT is_bot) "
        f"FROM s WHERE {CRAWLER}"
    ).fetchone()
    assert flagged > 0 and unflagged > 0


def test_daily_and_weekly_cycle(con: duckdb.DuckDBPyConnection) -> None:
    hourly = dict(con.execute("""
        SELECT hour(ended_at), count(*) FROM people
        WHERE isodow(ended_at) < 6 AND ended_at::DATE NOT IN ('2026-11-09', '2026-11-20')
        GROUP BY 1""").fetchall())
    peak = max(hourly, key=hourly.get)
    trough = min(hourly, key=hourly.get)
    assert 17 <= peak <= 21 and 3 <= trough <= 5
    assert 4 <= hourly[peak] / hourly[trough] <= 6
    weekend = one(con, """
        SELECT (count(*) FILTER (WHERE isodow(ended_at) >= 6) / 6)
               / (count(*) FILTER (WHERE isodow(ended_at) < 6) / 15)
        FROM people WHERE ended_at::DATE <> '2026-11-20'""")
    assert 1.1 <= weekend <= 1.3
    afternoon_over_evening = dict(con.execute("""
        SELECT site, count(*) FILTER (WHERE hour(ended_at) BETWEEN 14 AND 17)
                     / count(*) FILTER (WHERE hour(ended_at) BETWEEN 19 AND 22)
        FROM people WHERE ended_at::DATE NOT IN ('2026-11-09', '2026-11-20')
        GROUP BY site""").fetchall())
    # kids peak earlier in the evening
    assert afternoon_over_evening["kids"] > 1.1 * afternoon_over_evening["news"]


def test_no_other_incidents(con: duckdb.DuckDBPyConnection) -> None:
    """Apart from the labelled windows, daily failure and rebuffering stay in a narrow band."""
    days = con.execute(f"""
        SELECT ended_at::DATE, avg({FAILED}), {REBUFFERING}, median(startup_ms) FROM people
        WHERE ended_at::DATE NOT IN ('2026-11-12', '2026-11-13', '2026-11-16', '2026-11-17',
                                     '2026-11-18', '2026-11-19', '2026-11-20')
        GROUP BY 1""").fetchall()
    assert len(days) == 14
    assert all(0.009 <= fatal <= 0.02 for _, fatal, _, _ in days)
    assert all(0.003 <= ratio <= 0.007 for _, _, ratio, _ in days)
    assert all(800 <= startup <= 1000 for _, _, _, startup in days)


# --- the incidents -------------------------------------------------------------------------------


def test_cdn_country_outage(con: duckdb.DuckDBPyConnection) -> None:
    pair = "cdn = 'birch' AND country = 'DE' AND hour(ended_at) BETWEEN 14 AND 16"
    during, before, cdn_5xx, before_start = con.execute(f"""
        SELECT avg({FAILED}) FILTER (WHERE ended_at::DATE = '2026-11-16'),
               avg({FAILED}) FILTER (WHERE ended_at::DATE <> '2026-11-16'),
               avg((error_code = 'CDN-5XX')::INT) FILTER (WHERE ended_at::DATE = '2026-11-16'),
               avg((startup_ms IS NULL)::INT)
                   FILTER (WHERE ended_at::DATE = '2026-11-16' AND error_code = 'CDN-5XX')
        FROM people WHERE {pair}""").fetchone()
    assert 0.25 <= during <= 0.5 and during >= 5 * before
    assert cdn_5xx >= 0.25 and before_start >= 0.7
    # the rest of DE, and birch elsewhere, are not affected
    others = one(con, f"""
        SELECT max(rate) FROM (
            SELECT avg({FAILED}) AS rate FROM people
            WHERE ended_at >= '2026-11-16 14:00' AND ended_at < '2026-11-16 17:00'
              AND (country = 'DE') <> (cdn = 'birch')
            GROUP BY country = 'DE')""")
    assert others < 0.05


def test_new_title_decode_errors(con: duckdb.DuckDBPyConnection) -> None:
    first, site, per_day, catalogue_rank = con.execute("""
        SELECT min(ended_at), any_value(site), count(*) / 6,
               (SELECT rank FROM (SELECT title_id, rank() OVER (ORDER BY count(*) DESC) AS rank
                                  FROM people GROUP BY title_id) WHERE title_id = 't-3001')
        FROM people WHERE title_id = 't-3001'""").fetchone()
    assert T("2026-11-17 00:00") <= first < T("2026-11-17 01:00") and site == "kids"
    assert per_day >= 250 and catalogue_rank <= 20  # 2,500 a day at 2,000,000 sessions
    rates = dict(con.execute(f"""
        SELECT CASE WHEN ended_at < '2026-11-17 12:00' THEN 'fresh'
                    WHEN ended_at < '2026-11-19 12:00' THEN 'broken' ELSE 'fixed' END,
               avg({FAILED})
        FROM people WHERE title_id = 't-3001' GROUP BY 1""").fetchall())
    assert rates["fresh"] < 0.05 and rates["fixed"] < 0.05
    assert 0.24 <= rates["broken"] <= 0.38
    assert one(con, """
        SELECT avg((error_code = 'DECODE-ERR')::INT) FROM people
        WHERE title_id = 't-3001'
          AND ended_at >= '2026-11-17 12:00' AND ended_at < '2026-11-19 12:00'
          AND error_code IS NOT NULL""") > 0.9


def test_smart_tv_release_rollout_and_rollback(con: duckdb.DuckDBPyConnection) -> None:
    families, first, last = con.execute("""
        SELECT list(DISTINCT device_family), min(ended_at), max(ended_at) FROM s
        WHERE player_version = '9.0.0'""").fetchone()
    assert families == ["smart_tv"]
    assert T("2026-11-12 06:00") <= first < T("2026-11-12 07:00")
    assert T("2026-11-13 17:30") < last < T("2026-11-13 18:00")
    share = one(con, """
        SELECT avg((player_version = '9.0.0')::INT) FROM people
        WHERE device_family = 'smart_tv' AND ended_at >= '2026-11-12 09:00'
          AND ended_at < '2026-11-13 18:00'""")
    assert 0.70 <= share <= 0.80
    new, old, before = con.execute("""
        SELECT median(startup_ms) FILTER (WHERE player_version = '9.0.0'),
               median(startup_ms) FILTER (WHERE player_version <> '9.0.0'
                                            AND ended_at >= '2026-11-12 09:00'
                                            AND ended_at < '2026-11-13 18:00'),
               median(startup_ms) FILTER (WHERE ended_at < '2026-11-12')
        FROM people WHERE device_family = 'smart_tv'""").fetchone()
    assert 1.8 <= new / old <= 2.4 and 0.9 <= old / before <= 1.1


def test_android_release_broken_from_its_first_hour(con: duckdb.DuckDBPyConnection) -> None:
    families, first, last = con.execute("""
        SELECT list(DISTINCT device_family), min(ended_at), max(ended_at) FROM s
        WHERE player_version = '8.4.0'""").fetchone()
    assert families == ["android"]
    assert T("2026-11-19 15:00") <= first < T("2026-11-19 16:00")
    assert T("2026-11-20 23:00") < last < T("2026-11-21 00:00")
    span = ("device_family = 'android' AND ended_at >= '2026-11-19 15:00' "
            "AND ended_at < '2026-11-21 00:00'")
    assert 0.12 <= one(con, f"SELECT avg((player_version = '8.4.0')::INT) FROM people WHERE {span}") <= 0.18
    # bad from the first hour on, against the family's other releases over the same hours
    rates = dict(con.execute(f"""
        SELECT player_version = '8.4.0', avg({FAILED}) FROM people WHERE {span} GROUP BY 1""").fetchall())
    assert 0.03 <= rates[True] <= 0.065 and 0.01 <= rates[False] <= 0.02 and rates[True] >= 2.5 * rates[False]
    first_hours = one(con, f"""
        SELECT avg({FAILED}) FROM people
        WHERE {span} AND player_version = '8.4.0' AND ended_at < '2026-11-19 21:00'""")
    assert first_hours >= 2 * rates[False]
    p90 = dict(con.execute(f"""
        SELECT player_version = '8.4.0', quantile_cont(startup_ms, 0.9) FROM people
        WHERE {span} GROUP BY 1""").fetchall())
    assert 3200 <= p90[True] <= 4400 and 1500 <= p90[False] <= 2000
    # a share too small to make the family as a whole breach startup_time_by_device (factor 1.4 on
    # the 95th percentile of its earlier hours): the family's p90 over those hours against the day before
    family, before = con.execute("""
        SELECT quantile_cont(startup_ms, 0.9) FILTER (WHERE ended_at >= '2026-11-19 15:00'
                                                      AND ended_at < '2026-11-21 00:00'),
               quantile_cont(startup_ms, 0.9) FILTER (WHERE ended_at >= '2026-11-18 15:00'
                                                      AND ended_at < '2026-11-19 12:00')
        FROM people WHERE device_family = 'android'""").fetchone()
    assert family / before < 1.4


def test_live_match_traffic_and_rebuffering(con: duckdb.DuckDBPyConnection) -> None:
    rows = con.execute(f"""
        SELECT ended_at::DATE = '2026-11-20' AS match_day, count(*) AS n, {REBUFFERING}
        FROM people
        WHERE site = 'sport' AND hour(ended_at) BETWEEN 19 AND 21
        GROUP BY ended_at::DATE""").fetchall()
    match = [r for r in rows if r[0]]
    usual = [r for r in rows if not r[0]]
    assert len(match) == 1 and len(usual) == 20
    usual_sessions = sum(r[1] for r in usual) / len(usual)
    usual_ratio = sum(r[2] for r in usual) / len(usual)
    assert 2.5 <= match[0][1] / usual_sessions <= 3.5
    assert 3.5 <= match[0][2] / usual_ratio <= 6
    top_share, top_live = con.execute("""
        SELECT count(*) FILTER (WHERE title_id = top) / count(*),
               bool_and(is_live) FILTER (WHERE title_id = top)
        FROM (SELECT *, mode(title_id) OVER () AS top FROM people
              WHERE site = 'sport'
                AND ended_at >= '2026-11-20 19:00' AND ended_at < '2026-11-20 22:00')
        """).fetchone()
    assert top_share > 0.6 and top_live


# --- the decoys ----------------------------------------------------------------------------------


def test_crawler_burst(con: duckdb.DuckDBPyConnection) -> None:
    count, flagged, failed, titles, pairs = con.execute(f"""
        SELECT count(*), avg(is_bot::INT), avg({FAILED}), count(DISTINCT title_id),
               count(DISTINCT (cdn, country))
        FROM s
        WHERE {CRAWLER} AND site = 'news' AND ended_at >= '2026-11-09 03:00'
          AND ended_at < '2026-11-09 04:00' AND cdn = 'cedar' AND country = 'US'""").fetchone()
    assert count == pytest.approx(0.0025 * SESSIONS, rel=0.1)
    assert 0.4 <= flagged <= 0.6 and 0.7 <= failed <= 0.9 and titles <= 5 and pairs == 1
    usual_crawlers = one(con, f"""
        SELECT max(n) FROM (SELECT count(*) AS n FROM s WHERE {CRAWLER}
                              AND NOT (ended_at >= '2026-11-09 03:00'
                                       AND ended_at < '2026-11-09 04:00')
                            GROUP BY date_trunc('hour', ended_at))""")
    assert usual_crawlers < count / 10


def test_tiny_title(con: duckdb.DuckDBPyConnection) -> None:
    rows = con.execute("""
        SELECT site, ended_at, error_code, startup_ms FROM s WHERE title_id = 't-3002'
        ORDER BY ended_at""").fetchall()
    assert len(rows) == 3 and {r[0] for r in rows} == {"kids"}
    assert all(T("2026-11-14 10:00") <= r[1] < T("2026-11-14 11:00") for r in rows)
    assert sorted((r[2] or "") for r in rows) == ["", "DRM-LICENSE", "DRM-LICENSE"]
