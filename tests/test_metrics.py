"""Playback-quality metric definitions through the toolkit's measures.

Source: CTA-2066, "Streaming Quality of Experience Events, Properties and Metrics" (Consumer
Technology Association): stalled time percentage is Σ stall time ÷ Σ watched time, watched time
counting playing and stalls but not pauses; initial startup time leaves out sessions that never
started. The started / video start failure / exit-before-start split is common practice with no
single published source.
"""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path

import duckdb
import numpy as np
import pytest

from conftest import PLAIN_PROJECT, write_project
from toolkit.config.project import load_project
from toolkit.engine.runner import run

PROJECT = PLAIN_PROJECT


def one_hour_check(name: str, measure: str, where: str = "") -> str:
    return (f"check: {name}\nsource: sessions\nby: [site]\n{where}measure:\n{measure}\nwindow:\n  every: 1h\n"
            "baseline:\n  method: rolling_percentile\n  q: 0.5\n  history: 5\n  min_history: 5\n")


def test_cta_stalled_time_example_through_the_ratio_measure(tmp_path: Path) -> None:
    # CTA-2066's worked example: a 60 s clip watched to the end with one 10 s stall and one 30 s
    # pause has 70 s of watched time: 10 / 70 = 14.2857 % (the division is ours).
    lake = tmp_path / "lake"
    lake.mkdir()
    con = duckdb.connect()
    con.execute("CREATE TABLE t AS SELECT 's1' AS session_id, TIMESTAMP '2026-11-02 10:20:00' AS ended_at, "
                "'news' AS site, 60000 AS play_ms, 10000 AS rebuffer_ms, 30000 AS pause_ms "
                "UNION ALL SELECT 'closer', TIMESTAMP '2026-11-02 13:00:00', 'kids', 0, 0, 0")
    con.execute(f"COPY t TO '{lake / 'part.parquet'}' (FORMAT parquet)")
    check = one_hour_check("stalls", "  kind: ratio\n  numerator: rebuffer_ms\n  denominator: play_ms + rebuffer_ms")
    project = load_project(write_project(tmp_path, {"stalls.yml": check}, PROJECT.format(lake=lake)))
    run(project)
    value = duckdb.connect(str(project.warehouse), read_only=True).execute(
        "SELECT value FROM windows WHERE key_text = 'site=news'").fetchone()[0]
    assert value == pytest.approx(10 / 70) and round(100 * value, 4) == 14.2857


@pytest.fixture(scope="module")
def small_demo(tmp_path_factory: pytest.TempPathFactory, small_fernhill_lake) -> Path:
    """Four hourly checks by site run over the session's small demo lake, read in place."""
    folder = tmp_path_factory.mktemp("metrics")
    checks = {
        "started.yml": one_hour_check("started", "  kind: rate\n  bad: startup_ms IS NOT NULL"),
        "vsf.yml": one_hour_check("vsf", "  kind: rate\n  bad: error_code IS NOT NULL AND startup_ms IS NULL"),
        "ebvs.yml": one_hour_check("ebvs", "  kind: rate\n  bad: error_code IS NULL AND startup_ms IS NULL"),
        "p90.yml": one_hour_check("p90", "  kind: quantile\n  of: startup_ms\n  q: 0.9",
                                  "where: startup_ms IS NOT NULL\n"),
    }
    project = load_project(write_project(folder, checks, PROJECT.format(lake=small_fernhill_lake.path)))
    run(project)
    return folder


def test_started_vsf_and_ebvs_add_up_to_all_attempts(small_demo: Path) -> None:
    con = duckdb.connect(str(small_demo / "w.duckdb"), read_only=True)
    sums = con.execute("""
        SELECT key_text, window_number, sum(value) AS total, count(*) AS measures, min(sessions) = max(sessions) AS same_n
        FROM windows WHERE check_name IN ('started', 'vsf', 'ebvs') GROUP BY key_text, window_number
    """).fetchall()
    assert len(sums) > 1000
    assert all(measures == 3 and same_n for _, _, _, measures, same_n in sums)
    assert all(total == pytest.approx(1.0) for _, _, total, _, _ in sums)


def test_startup_time_leaves_out_sessions_that_never_started(small_demo: Path, small_fernhill_lake) -> None:
    con = duckdb.connect(str(small_demo / "w.duckdb"), read_only=True)
    key_text, start, sessions, value = con.execute(
        "SELECT key_text, window_start, sessions, value FROM windows WHERE check_name = 'p90' "
        "ORDER BY sessions DESC LIMIT 1").fetchone()
    site = key_text.split("=", 1)[1]
    rows = con.execute(
        "SELECT startup_ms FROM read_parquet($files) WHERE site = $site AND ended_at >= $start AND ended_at < $end",
        {"files": str(small_fernhill_lake.path / "**" / "*.parquet"), "site": site, "start": start,
         "end": start + timedelta(hours=1)}).fetchall()
    started = [r[0] for r in rows if r[0] is not None]
    never = [r for r in rows if r[0] is None]
    assert never, "the window should hold sessions that never started"
    assert sessions == len(started)
    assert value == pytest.approx(float(np.quantile(started, 0.9, method="linear")))
