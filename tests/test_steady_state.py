"""What an incremental run reads stays bounded as history grows: the baseline and measure stages read
a row per changed series (series_state, key_state.recent, kept by the persist stage) instead of each
series' whole history in `windows`, and what they keep equals what the whole history gives."""

from __future__ import annotations

import dataclasses
import shutil
from pathlib import Path

import duckdb
import pytest

from conftest import PROJECT, _normal, write_project
from test_published_copies import cut_lake, land
from toolkit.config.project import load_project
from toolkit.engine import warehouse
from toolkit.engine.runner import run
from toolkit.sql.compiler import compile_check

GOLDEN = Path(__file__).parent / "golden"
CHECKS = ("title_decode_errors.yml", "site_failures_p_chart.yml", "site_failures_cusum.yml",
          "startup_p90_by_site.yml", "rebuffering_ratio.yml", "play_time_down.yml")


def state(con: duckdb.DuckDBPyConnection) -> dict[str, list[tuple]]:
    return {
        "series_state": sorted((_normal(r) for r in con.execute("SELECT * FROM series_state").fetchall()), key=repr),
        "key_state": sorted((_normal(r) for r in con.execute("SELECT * FROM key_state").fetchall()), key=repr),
    }


def test_the_baseline_and_measure_stages_never_read_the_windows_table(tmp_path: Path) -> None:
    project = load_project(write_project(tmp_path, {name: (GOLDEN / name).read_text() for name in CHECKS}))
    for check in project.checks.values():
        for stage in compile_check(check).stages:
            if stage.name in ("measure", "verdict"):
                text = "\n".join(s.sql for s in (*stage.once, *(stage.loop.rounds if stage.loop else ())))
                assert "FROM windows" not in text and "JOIN windows" not in text, (check.name, stage.name)
                assert "key_windows" not in text.replace("new_key_windows", ""), (check.name, stage.name)


def test_what_runs_keep_per_series_equals_what_the_whole_history_gives(tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    slices = cut_lake(lake)
    write_project(tmp_path, {name: (GOLDEN / name).read_text() for name in CHECKS}, project=PROJECT.format(lake=lake))
    for piece in slices:
        land(lake, piece)
        run(load_project(tmp_path / "plimsoll.yml"))
    con = duckdb.connect(str(tmp_path / "warehouse.duckdb"), read_only=True)
    kept = state(con)
    assert kept["series_state"] and any(r[3] for r in kept["series_state"])
    assert {r[0] for r in kept["series_state"]} == {(GOLDEN / n).read_text().split()[1] for n in CHECKS}
    con.close()

    # the same made afresh from the stored windows, as a file of layout 6 is converted
    copy = tmp_path / "converted.duckdb"
    shutil.copy(tmp_path / "warehouse.duckdb", copy)
    con = duckdb.connect(str(copy))
    con.execute("DELETE FROM series_state")
    con.execute("UPDATE key_state SET recent = NULL")
    con.execute("UPDATE schema_version SET version = 6")
    con.close()
    project = load_project(tmp_path / "plimsoll.yml")
    converted = warehouse.connect(dataclasses.replace(project, warehouse=copy))
    assert state(converted) == kept
    converted.close()


@pytest.mark.parametrize("history", [3, 10])
def test_a_split_value_first_seen_late_has_its_keys_quiet_windows_as_history(tmp_path: Path, history: int) -> None:
    # file by file against one run over everything: the quiet history of a split value first seen
    # in a later run comes from key_state.recent, not from the key's stored windows
    text = (GOLDEN / "title_decode_errors.yml").read_text().replace("history: 10", f"history: {history}")
    lake = tmp_path / "a" / "lake"
    slices = cut_lake(lake)
    write_project(tmp_path / "a", {"t.yml": text}, project=PROJECT.format(lake=lake))
    for piece in slices:
        land(lake, piece)
        run(load_project(tmp_path / "a" / "plimsoll.yml"))
    write_project(tmp_path / "b", {"t.yml": text}, project=PROJECT.format(lake=lake))
    run(load_project(tmp_path / "b" / "plimsoll.yml"))
    rows = []
    for side in ("a", "b"):
        con = duckdb.connect(str(tmp_path / side / "warehouse.duckdb"), read_only=True)
        rows.append(sorted((_normal(r) for r in con.execute(
            "SELECT key_text, split_value, window_number, value, baseline, threshold, breach, history_windows "
            "FROM windows").fetchall()), key=repr))
        if side == "a":  # some split value came after its key's first window, in a later run
            late = con.execute(
                "SELECT count(*) FROM (SELECT key, split_value, min(key_window) AS first, min(run_id) AS run "
                "FROM windows GROUP BY ALL) AS s WHERE first > 1 AND run > (SELECT min(run_id) FROM windows)"
            ).fetchone()[0]
            assert late > 0
        con.close()
    assert rows[0] == rows[1]
