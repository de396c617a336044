"""The benchmark's hand-written title check gives Plimsoll's windows and alerts.

benchmarks/bench.py compares `plimsoll run --check title_errors` with benchmarks/title_by_hand.sql;
the ratio means something only if both compute the same thing. The sessions here are invented
for the purpose: a dense title with a failure burst that recovers, one whose burst is followed by
days of silence (an alert that expires between windows), one that goes silent for good (expires
at the watermark), a sparse title whose windows close on max_wait, a title that never fills a
window, crawlers flagged and unflagged, rows without a title, and session ids read twice.
"""

from __future__ import annotations

import importlib.util
import random
from datetime import datetime, timedelta
from pathlib import Path

import duckdb

import pyarrow as pa
import pyarrow.parquet as pq

from conftest import write_project
from toolkit.demo.run import PROJECT_YML, catalogue_folder
from toolkit.config.project import load_project
from toolkit.engine.runner import run

ROOT = Path(__file__).resolve().parent.parent
SCHEMA = pa.schema([("session_id", pa.string()), ("ended_at", pa.timestamp("us")), ("site", pa.string()),
                    ("title_id", pa.string()), ("error_code", pa.string()), ("is_bot", pa.bool_()),
                    ("user_agent", pa.string())])
START = datetime(2026, 11, 2)
PLAYER = "FernhillPlayer/5.2 (smart_tv)"


def _bench():
    spec = importlib.util.spec_from_file_location("plimsoll_bench", ROOT / "benchmarks" / "bench.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def write_rows(folder: Path, rows: list[tuple]) -> None:
    folder.mkdir(parents=True)
    columns = list(zip(*rows))
    pq.write_table(pa.Table.from_arrays([pa.array(c, f.type) for c, f in zip(columns, SCHEMA)], schema=SCHEMA),
                   folder / "part-0.parquet")


def _title(rng: random.Random, site: str, title: str, count: int, first_day: float, last_day: float,
           rate: float, bursts: list[tuple[float, float, str, float]]) -> list[tuple]:
    rows = []
    for n in range(count):
        day = rng.uniform(first_day, last_day)
        at = START + timedelta(minutes=round(day * 1440))  # whole minutes: ties in ended_at
        code = "DRM-LICENSE" if rng.random() < rate else None
        for since, until, burst_code, share in bursts:
            if since <= day < until and rng.random() < share:
                code = burst_code
        agent = None if rng.random() < 0.01 else PLAYER
        is_bot = None if rng.random() < 0.01 else False
        rows.append((f"{title}-{n:06d}", at, site, title, code, is_bot, agent))
    return rows


def sessions() -> tuple[list[tuple], list[tuple]]:
    rng = random.Random(20261102)
    rows = []
    rows += _title(rng, "kids", "t-1", 6000, 0, 10, 0.01, [(5.0, 5.5, "DECODE-ERR", 0.4), (9.8, 10, "DECODE-ERR", 0.5)])
    rows += _title(rng, "news", "t-2", 3000, 0, 4, 0.01, [(3.5, 4.0, "CDN-5XX", 0.3)])
    rows += _title(rng, "news", "t-2", 1000, 9, 10, 0.01, [])
    rows[-1000:] = [(f"t-2-late-{i:05d}", *r[1:]) for i, r in enumerate(rows[-1000:])]
    rows += _title(rng, "sport", "t-3", 2500, 0, 6, 0.01, [(5.4, 6.0, "NET-TIMEOUT", 0.5)])
    rows += _title(rng, "kids", "t-4", 600, 0, 10, 0.1, [(6.0, 7.0, "DECODE-ERR", 0.4)])
    rows += _title(rng, "news", "t-5", 50, 0, 10, 0.2, [])
    rows += [(f"untitled-{n}", START + timedelta(hours=n), "news", None, "DRM-LICENSE", False, PLAYER)
             for n in range(200)]
    crawl = START + timedelta(days=5, hours=2)
    rows += [(f"bot-{n}", crawl + timedelta(seconds=n), "kids", "t-1", "CDN-5XX", True, "FernCrawler/2.0")
             for n in range(300)]
    rows += [(f"unflagged-{n}", crawl + timedelta(seconds=n), "kids", "t-1", "CDN-5XX", False,
              "Mozilla/5.0 (compatible; Sandpiperbot/1.1)") for n in range(300)]
    # read again in a later file, later and failing: the first copy counts, once
    again = [(r[0], r[1] + timedelta(hours=3), r[2], r[3], "CDN-5XX", False, PLAYER) for r in rows[100:160]]
    return rows, again


def test_the_hand_written_title_check_matches_plimsoll(tmp_path):
    rows, again = sessions()
    lake = tmp_path / "lake" / "sessions"
    write_rows(lake / "day=early", [r for r in rows if r[1] < START + timedelta(days=5)])
    write_rows(lake / "day=late", [r for r in rows if r[1] >= START + timedelta(days=5)])
    write_rows(lake / "day=replay", again)
    check = (catalogue_folder() / "title_errors.yml").read_text(encoding="utf-8")
    # the demo's project without the keys naming columns this small lake does not have
    plain = "\n".join(line for line in PROJECT_YML.splitlines()
                       if not line.strip().startswith(("viewer_id:", "attributes:"))) + "\n"
    project = write_project(tmp_path, {"title_errors.yml": check}, project=plain)
    run(load_project(project))

    con = duckdb.connect()
    bench = _bench()
    files = sorted(str(p) for p in lake.rglob("*.parquet"))
    bench.run_by_hand(con, files)
    con.execute(f"ATTACH '{tmp_path / 'warehouse.duckdb'}' AS plimsoll (READ_ONLY)")
    window = ("key_text, split_value, window_number, window_start, window_end, sessions, bad, round(value, 12), "
              "round(threshold, 12), breach")
    alert = ("key_text, split_value, status, close_reason, opened_at, closed_at, breach_windows, "
             "affected_sessions, round(peak_value, 12), round(threshold, 12)")
    by_hand = con.execute(f"SELECT {window} FROM title_windows ORDER BY ALL").fetchall()
    plimsoll = con.execute(f"SELECT {window} FROM plimsoll.windows ORDER BY ALL").fetchall()
    assert by_hand == plimsoll
    by_hand = con.execute(f"SELECT {alert} FROM title_alerts ORDER BY ALL").fetchall()
    plimsoll = con.execute(f"SELECT {alert} FROM plimsoll.alerts ORDER BY ALL").fetchall()
    assert by_hand == plimsoll
    # the cases the data was made for are all there
    shown = {(a[0], a[2], a[3]) for a in plimsoll}
    assert ("site=kids, title_id=t-1", "closed", "recovered") in shown
    assert ("site=kids, title_id=t-1", "open", None) in shown
    assert ("site=news, title_id=t-2", "closed", "expired") in shown
    assert ("site=sport, title_id=t-3", "closed", "expired") in shown
    short = con.execute("SELECT count(*) FROM plimsoll.windows WHERE sessions < 200").fetchone()[0]
    assert short > 0
