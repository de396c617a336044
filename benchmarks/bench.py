"""Benchmark: what a Plimsoll run costs against the floor, measured in one run on the same data.

    python benchmarks/bench.py --sessions 2000000 [--workdir DIR] [--json FILE]

Builds the Fernhill Broadcasting demo lake at that size over 31 days (or reuses DIR's), then runs
each measurement in a fresh process, so its peak memory (max RSS: VmHWM) is its own:

  floor      one plain DuckDB GROUP BY over the columns the title check reads
  by_hand    benchmarks/title_by_hand.sql: the title check written as DuckDB SQL by hand
  title      `plimsoll run --check title_errors` on a fresh warehouse
  oracle     the pandas oracle (tests/oracle.py) doing the same check
  catalogue  `plimsoll run` of the whole catalogue on a fresh warehouse
  no_causes  the same without `attributes` (so no alert is explained), on a fresh warehouse
  increment  the catalogue over the first 30 days, then one incremental run adding the 31st
  hourly     from the same 30 days, the 31st day landing as 24 hourly files, a run after each
  year       the 31st day after a synthetic year of history (the 30 days' windows replayed eleven
             times, each 30 days earlier), against `increment`, the same day after a month

and prints seconds, peak MiB, DuckDB's own peak, the windows and alerts each produced, the ratios
against their targets, and where the Plimsoll runs spend their time, stage by stage; the same
figures go to a JSON file. A benchmark, not a test: nothing here asserts a time.

The figures the docs quote live in one place, benchmarks/RESULTS.md, written from such a JSON file:

    python benchmarks/bench.py --sessions 20000000 --json benchmarks/results.json
    python benchmarks/bench.py --page benchmarks/results.json > benchmarks/RESULTS.md
"""

from __future__ import annotations

import argparse
import glob
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from datetime import timedelta
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
BY_HAND = HERE / "title_by_hand.sql"
DAYS = 31
CRAWLER = r"(?i)(bot|crawler|spider)"
# (numerator, denominator, target, meaning)
RATIOS = (
    ("title", "by_hand", 1.3, "Plimsoll's title check against the same check written by hand"),
    ("title", "oracle", 0.25, "Plimsoll against the pandas oracle"),
    ("catalogue", "title", 3.0, "the whole catalogue against the title check alone"),
    ("increment", "catalogue", 0.1, "one new day after 30 against a full run"),
    ("catalogue", "no_causes", 1.2, "the catalogue with its alerts' causes and incidents against it without causes"),
    ("year", "increment", 1.3, "one new day after a year of history against the same day after a month"),
)
PEAK_FLAT = 1.05  # the year's peak memory against the month's: flat, within measurement noise
HOURLY_TARGET = 2.0  # seconds: the median and the slowest of the 24 hourly runs after 30 days
HOURS = 24
YEAR_BLOCKS = 11  # the 30 days' history replayed this many times, each block 30 days before the last
THIRTY_DAYS = "thirty-days"  # in WORKDIR: the warehouse after the first 30 days, kept for hourly and year
ORACLE_SHARE = 2_500_000  # sessions the oracle holds at a time (about 3 GiB as Python dicts)
MEMORY_TARGET_MIB = 2048  # the catalogue's peak with the default memory limit
LIMIT_VARIABLE = "PLIMSOLL_BENCH_MEMORY_LIMIT"  # --memory-limit, passed to the children

FLOOR = f"""
SELECT site, title_id, error_code, count(session_id) AS sessions, max(ended_at) AS latest
FROM read_parquet($files, hive_partitioning = true, union_by_name = true)
WHERE NOT coalesce(is_bot OR regexp_matches(user_agent, '{CRAWLER}'), false) AND title_id IS NOT NULL
GROUP BY ALL
"""


def lake_files(workdir: Path) -> list[str]:
    return sorted(glob.glob(str(workdir / "lake" / "sessions" / "**" / "*.parquet"), recursive=True))


def statements(sql: str) -> list[str]:
    """The statements of a script whose statements end with a semicolon at the end of a line."""
    parts = re.split(r";[ \t]*(?:--[^\n]*)?\n", sql + "\n")
    code = [p for p in parts if any(line.strip() and not line.strip().startswith("--") for line in p.splitlines())]
    return [p.strip() for p in code]


def run_by_hand(con: Any, files: list[str]) -> tuple[int, int]:
    """Run title_by_hand.sql over ``files``; leaves title_windows and title_alerts on ``con``."""
    for statement in statements(BY_HAND.read_text(encoding="utf-8")):
        con.execute(statement, {"files": files} if "$files" in statement else None)
    return (con.execute("SELECT count(*) FROM title_windows").fetchone()[0],
            con.execute("SELECT count(*) FROM title_alerts").fetchone()[0])


def oracle_check() -> Any:
    """checks/title_errors.yml as the oracle's Python callables, with the demo's crawler filter."""
    import oracle

    crawler = re.compile(CRAWLER[4:], re.IGNORECASE)
    return oracle.OracleCheck(
        name="title_errors", by=("site", "title_id"), kind="rate",
        bad=lambda r: r["error_code"] is not None, split="error_code",
        where=lambda r: r["title_id"] is not None,
        exclude=lambda r: bool(r["is_bot"]) or (r["user_agent"] is not None and bool(crawler.search(r["user_agent"]))),
        sessions=200, max_wait=timedelta(days=2), base_q=0.9, history=30, min_history=4,
        factor=2.0, floor=0.05, min_sessions=100, min_bad=10, recover_after=2,
        expire_after=timedelta(days=3), severity="high",
    )


# ----------------------------------------------------------------------------------------------
# the measurements, each run in a child process: `bench.py --child NAME WORKDIR`


def _connect() -> Any:
    """An in-memory DuckDB with the benchmark's memory limit, as the project's runs get it."""
    import duckdb

    con = duckdb.connect()
    if os.environ.get(LIMIT_VARIABLE):
        con.execute("SET memory_limit = $m", {"m": os.environ[LIMIT_VARIABLE]})
    return con


def _child_floor(workdir: Path) -> dict[str, Any]:
    con = _connect()
    rows = con.execute(FLOOR, {"files": lake_files(workdir)}).fetchall()
    return {"groups": len(rows)}


def _child_by_hand(workdir: Path) -> dict[str, Any]:
    con = _connect()
    windows, alerts = run_by_hand(con, lake_files(workdir))
    return {"windows": windows, "alerts": alerts}


def _child_oracle(workdir: Path) -> dict[str, Any]:
    """The oracle over the lake, a share of the titles at a time: it holds every session as a Python
    dict, which for the whole of a large lake would not fit in memory. Series are independent and
    every share is judged at the watermark of the whole lake, so the windows are the same."""
    import duckdb

    sys.path.insert(0, str(HERE.parent / "tests"))
    import oracle

    con = duckdb.connect()
    files = lake_files(workdir)
    rows_in_lake, latest = con.execute(
        "SELECT count(*), max(ended_at) FROM read_parquet($files, hive_partitioning = true, union_by_name = true)",
        {"files": files}).fetchone()
    shares = max(1, -(-rows_in_lake // ORACLE_SHARE))
    windows = alerts = 0
    for share in range(shares):
        frame = con.execute(
            "SELECT session_id, ended_at, site, title_id, error_code, is_bot, user_agent, filename AS _file "
            "FROM read_parquet($files, hive_partitioning = true, union_by_name = true, filename = true) "
            "WHERE hash(site, title_id) % $shares = $share",
            {"files": files, "shares": shares, "share": share}).df()
        rows = frame.astype(object).where(frame.notna(), None).to_dict("records")
        del frame
        for row in rows:
            row["ended_at"] = row["ended_at"].to_pydatetime() if row["ended_at"] is not None else None
        result = oracle.run_check(oracle_check(), rows, watermark_at=latest)
        windows, alerts = windows + len(result.windows), alerts + len(result.alerts)
        del rows, result
    return {"windows": windows, "alerts": alerts, "shares": shares}


class _Stages:
    """Times every statement the runner executes, by stage and by check, and DuckDB's memory."""

    def __init__(self) -> None:
        self.by_stage: dict[str, float] = defaultdict(float)
        self.by_check: dict[str, float] = defaultdict(float)
        self.statements: dict[str, float] = defaultdict(float)
        self.duckdb_peak = 0

    def install(self) -> None:
        from toolkit.engine import runner

        original = runner._execute

        def timed(con: Any, who: str, stage: str, statement: Any, params: dict[str, Any], **kw: Any) -> Any:
            t = time.perf_counter()
            out = original(con, who, stage, statement, params, **kw)
            spent = time.perf_counter() - t
            self.by_stage[stage] += spent
            self.by_check[who] += spent
            first = next((line for line in statement.sql.splitlines()
                          if line.strip() and not line.strip().startswith("--")), "")
            self.statements[f"{stage}: {first.strip()[:70]}"] += spent
            if kw.get("fetch") != "reader":  # a stream left open: nothing else may run on its connection
                used = con.execute("SELECT coalesce(sum(memory_usage_bytes), 0) FROM duckdb_memory()").fetchall()[0][0]
                self.duckdb_peak = max(self.duckdb_peak, int(used))
            return out

        runner._execute = timed

    def report(self) -> dict[str, Any]:
        top = sorted(self.statements.items(), key=lambda kv: -kv[1])[:8]
        return {"stages": dict(self.by_stage), "checks": dict(self.by_check), "top_statements": dict(top),
                "duckdb_peak_mib": self.duckdb_peak / 2**20}


def _without_attributes(workdir: Path) -> Path:
    """The demo project without its source's `attributes`: the same run, no causes computed."""
    bare = workdir / "plimsoll-no-causes.yml"
    text = (workdir / "plimsoll.yml").read_text(encoding="utf-8")
    bare.write_text("\n".join(line for line in text.splitlines() if not line.strip().startswith("attributes:")) + "\n",
                    encoding="utf-8")
    return bare


def _plimsoll(workdir: Path, checks: list[str] | None, project_file: Path | None = None) -> dict[str, Any]:
    from toolkit.config.project import load_project
    from toolkit.engine.runner import run

    stages = _Stages()
    stages.install()
    t = time.perf_counter()
    project = load_project(project_file or workdir / "plimsoll.yml")
    loading = time.perf_counter() - t
    result = run(project, checks)
    import duckdb

    con = duckdb.connect(str(project.warehouse), read_only=True)
    windows = con.execute("SELECT count(*) FROM windows WHERE run_id = $r", {"r": result.run_id}).fetchone()[0]
    alerts = con.execute("SELECT count(*) FROM alerts WHERE last_run_id = $r", {"r": result.run_id}).fetchone()[0]
    con.close()
    return {"windows": windows, "alerts": alerts, "files": result.files_read, "load_seconds": loading,
            **stages.report()}


CHILDREN = {
    "floor": _child_floor,
    "by_hand": _child_by_hand,
    "title": lambda w: _plimsoll(w, ["title_errors"]),
    "oracle": _child_oracle,
    "catalogue": lambda w: _plimsoll(w, None),
    "no_causes": lambda w: _plimsoll(w, None, _without_attributes(w)),
    "increment": lambda w: _plimsoll(w, None),
    "hourly": lambda w: _plimsoll(w, None),
    "year": lambda w: _plimsoll(w, None),
    "year_history": lambda w: _year_history(w),
}


def child(name: str, workdir: Path) -> None:
    t = time.perf_counter()
    out = CHILDREN[name](workdir)
    out["seconds"] = time.perf_counter() - t
    out["peak_mib"] = own_peak_mib()
    print(json.dumps(out))


def own_peak_mib() -> float | None:
    """This process's peak RSS since exec (VmHWM). getrusage's ru_maxrss of a child also counts the
    parent's pages at fork, so after the parent has built a lake it would report the parent."""
    try:
        status = Path("/proc/self/status").read_text()
    except OSError:
        return None
    match = re.search(r"^VmHWM:\s+(\d+) kB", status, re.MULTILINE)
    return int(match.group(1)) / 1024 if match else None


def measured(name: str, workdir: Path) -> dict[str, Any]:
    """Run one measurement in a fresh Python, which reports its own peak RSS (else wait4's)."""
    with tempfile.TemporaryFile("w+") as out:
        proc = subprocess.Popen([sys.executable, __file__, "--child", name, str(workdir)], stdout=out)
        _, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
        if proc.returncode:
            raise SystemExit(f"bench: measurement {name} failed (exit {proc.returncode})")
        out.seek(0)
        result = json.loads(out.read().strip().splitlines()[-1])
    if result.get("peak_mib") is None:
        result["peak_mib"] = usage.ru_maxrss / 1024  # Linux reports KiB
    return result


def fresh_warehouse(workdir: Path) -> None:
    for stale in workdir.glob("warehouse.duckdb*"):
        stale.unlink()


# ----------------------------------------------------------------------------------------------
# the whole benchmark


def prepare(workdir: Path, sessions: int, memory_limit: str | None) -> int:
    """Build the lake unless WORKDIR holds one already; returns the lake's session count."""
    from toolkit.demo.run import prepare_workdir, write_project
    from toolkit.engine.warehouse import DEFAULT_MEMORY_LIMIT
    from toolkit.warehouse_demo.generate import build_lake

    marker = workdir / "bench-lake.json"
    if not marker.exists():
        prepare_workdir(workdir)
        t = time.perf_counter()
        build_lake(workdir, sessions=sessions, days=DAYS)
        say(f"lake of {sessions:,} sessions over {DAYS} days built in {time.perf_counter() - t:.1f} s")
        marker.write_text(json.dumps({"sessions": sessions, "days": DAYS}), encoding="utf-8")
    project = write_project(workdir)
    # the hand-written queries get the same limit as Plimsoll's runs: the project's default unless set
    os.environ[LIMIT_VARIABLE] = memory_limit or DEFAULT_MEMORY_LIMIT
    if memory_limit:
        project.write_text(project.read_text(encoding="utf-8") + f"memory_limit: {memory_limit}\n", encoding="utf-8")
    return int(json.loads(marker.read_text(encoding="utf-8"))["sessions"])


def say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def measure_all(workdir: Path, skip: set[str], keep_thirty_days: bool = False) -> dict[str, dict[str, Any]]:
    results: dict[str, dict[str, Any]] = {}
    for name in ("floor", "by_hand", "title", "oracle", "catalogue", "no_causes"):
        if name in skip:
            continue
        fresh_warehouse(workdir)
        say(f"measuring {name}")
        results[name] = measured(name, workdir)
    if {"increment", "hourly", "year"} <= skip:
        return results
    days = sorted((workdir / "lake" / "sessions").iterdir())
    saved = workdir / THIRTY_DAYS
    if not (keep_thirty_days and saved.exists()):
        with _parked(days[-1], workdir):
            fresh_warehouse(workdir)
            say(f"catalogue over the first {len(days) - 1} days")
            results["first_30_days"] = measured("catalogue", workdir)
        _save_state(workdir, saved)
    if "increment" not in skip:
        _restore_state(saved, workdir)
        say("measuring increment")
        results["increment"] = measured("increment", workdir)
    if "hourly" not in skip:
        _restore_state(saved, workdir)
        results["hourly"] = measure_hourly(workdir, days[-1])
    if "year" not in skip:
        _restore_state(saved, workdir)
        with _parked(days[-1], workdir):
            say(f"a year of history: the 30 days' windows replayed {YEAR_BLOCKS} times")
            results["year_history"] = measured("year_history", workdir)
        say("measuring year")
        results["year"] = measured("year", workdir)
    return results


STATE = ("warehouse.duckdb", "warehouse.duckdb.wal", "warehouse_tables")


def _save_state(workdir: Path, saved: Path) -> None:
    """The warehouse and its published copies, kept to start the later measurements from."""
    if saved.exists():
        shutil.rmtree(saved)
    saved.mkdir()
    for item in STATE:
        if (workdir / item).is_dir():
            shutil.copytree(workdir / item, saved / item, symlinks=True)
        elif (workdir / item).exists():
            shutil.copy2(workdir / item, saved / item)


def _restore_state(saved: Path, workdir: Path) -> None:
    fresh_warehouse(workdir)
    if (workdir / "warehouse_tables").exists():
        shutil.rmtree(workdir / "warehouse_tables")
    for item in STATE:
        if (saved / item).is_dir():
            shutil.copytree(saved / item, workdir / item, symlinks=True)
        elif (saved / item).exists():
            shutil.copy2(saved / item, workdir / item)


class _parked:
    """The lake's last day moved out of the lake for the length of a ``with``, and back after."""

    def __init__(self, day: Path, workdir: Path) -> None:
        self.day, self.place = day, workdir / "parked-day"

    def __enter__(self) -> Path:
        shutil.move(str(self.day), self.place)
        return self.place

    def __exit__(self, *exc: Any) -> None:
        if self.day.exists():
            shutil.rmtree(self.day)
        shutil.move(str(self.place), self.day)


def measure_hourly(workdir: Path, day: Path) -> dict[str, Any]:
    """The last day cut into HOURS files by the hour of its sessions' event time, each landing in
    the lake before a run of its own (a fresh process each, as a scheduler starts them)."""
    import duckdb

    hours = workdir / "hours"
    if not (hours / "done").exists():
        hours.mkdir(exist_ok=True)
        con = duckdb.connect()
        files = sorted(str(f) for f in day.glob("*.parquet"))
        for hour in range(HOURS):
            con.execute(
                "COPY (SELECT * EXCLUDE (day) FROM read_parquet($files, hive_partitioning = true) "
                "WHERE least(23, greatest(0, hour(ended_at))) = $hour ORDER BY ended_at) "
                f"TO '{hours / f'hour-{hour:02d}.parquet'}' (FORMAT parquet)", {"files": files, "hour": hour})
        con.close()
        (hours / "done").write_text("", encoding="utf-8")
    runs = []
    with _parked(day, workdir):
        day.mkdir()
        for hour in range(HOURS):
            shutil.copy(hours / f"hour-{hour:02d}.parquet", day / f"hour-{hour:02d}.parquet")
            say(f"measuring hourly, hour {hour + 1} of {HOURS}")
            runs.append(measured("hourly", workdir))
    seconds = sorted(r["seconds"] for r in runs)
    median = (seconds[(HOURS - 1) // 2] + seconds[HOURS // 2]) / 2
    return {"seconds": median, "max_seconds": seconds[-1], "peak_mib": max(r["peak_mib"] for r in runs),
            "duckdb_peak_mib": max(r.get("duckdb_peak_mib", 0) for r in runs),
            "windows": sum(r["windows"] for r in runs), "alerts": runs[-1]["alerts"],
            "runs": [{k: r[k] for k in ("seconds", "peak_mib", "windows", "load_seconds")} for r in runs],
            "stages": _median_stages(runs), "checks": {}, "load_seconds": sorted(r["load_seconds"] for r in runs)[HOURS // 2],
            "top_statements": runs[HOURS // 2]["top_statements"]}


def _median_stages(runs: list[dict[str, Any]]) -> dict[str, float]:
    names = {name for r in runs for name in r["stages"]}
    return {name: sorted(r["stages"].get(name, 0.0) for r in runs)[len(runs) // 2] for name in names}


def _year_history(workdir: Path) -> dict[str, Any]:
    """A year of history in the warehouse of the first 30 days, made in seconds: its windows, key
    windows and files read replayed YEAR_BLOCKS times, block k shifted 30 k days earlier (count
    windows numbered before the first, time windows by their time, as runs would have numbered
    them), then published once, as the runs of that year would have left the copies."""
    import duckdb

    from toolkit.config.project import load_project
    from toolkit.engine import warehouse

    project = load_project(workdir / "plimsoll.yml")
    con = warehouse.connect(project)
    block = timedelta(days=30)
    steps = {name: (block // check.window.every if check.window.kind == "time" else None)
             for name, check in project.checks.items()}
    con.execute("BEGIN TRANSACTION")
    con.execute("CREATE TEMP TABLE steps (check_name VARCHAR, step BIGINT)")
    con.executemany("INSERT INTO steps VALUES (?, ?)", [[name, step] for name, step in steps.items()])
    # what one block shifts: a time window's number by the windows in 30 days, a count window's and
    # every key window's by the check's own count, so the replayed ones come before the first
    con.execute("CREATE TEMP TABLE spans AS SELECT k.check_name, "
                "coalesce(any_value(p.step), max(k.window_number) - min(k.window_number) + 1) AS numbers, "
                "max(k.key_window) AS key_windows "
                "FROM key_windows AS k LEFT JOIN steps AS p USING (check_name) GROUP BY k.check_name")
    for table in ("windows", "key_windows"):
        con.execute(f"CREATE TEMP TABLE month AS SELECT * FROM {table}")
        for k in range(1, YEAR_BLOCKS + 1):
            con.execute(
                f"INSERT INTO {table} SELECT m.* REPLACE ("
                "m.window_start - $shift AS window_start, m.window_end - $shift AS window_end, "
                "m.window_number - $k * s.numbers AS window_number, m.key_window - $k * s.key_windows AS key_window) "
                "FROM month AS m JOIN spans AS s USING (check_name)", {"shift": k * block, "k": k})
        con.execute("DROP TABLE month")
    for k in range(1, YEAR_BLOCKS + 1):
        con.execute("INSERT INTO files_read BY NAME SELECT * REPLACE ('replayed-' || $k || '/' || path AS path) "
                    "FROM files_read WHERE NOT starts_with(path, 'replayed-')", {"k": k})
    con.execute("COMMIT")
    con.execute("CHECKPOINT")
    windows = con.execute("SELECT count(*) FROM windows").fetchone()[0]
    warehouse.publish(con, project)
    con.close()
    return {"windows": windows}


def ratios(results: dict[str, dict[str, Any]]) -> list[dict[str, Any]]:
    out = []
    for top, bottom, target, meaning in RATIOS:
        if top in results and bottom in results:
            value = results[top]["seconds"] / results[bottom]["seconds"]
            out.append({"ratio": f"{top}/{bottom}", "value": value, "target": target,
                        "met": value <= target, "meaning": meaning})
    return out


def table(sessions: int, results: dict[str, dict[str, Any]], found: list[dict[str, Any]]) -> str:
    limit = os.environ.get(LIMIT_VARIABLE) or "DuckDB's default"
    lines = [f"Plimsoll benchmark: {sessions:,} sessions over {DAYS} days, {os.cpu_count()} cores, "
             f"memory limit {limit}", "",
             f"{'measurement':<15}{'seconds':>9}{'peak MiB':>10}{'DuckDB MiB':>12}{'windows':>10}{'alerts':>8}"]
    for name, r in results.items():
        duck = f"{r['duckdb_peak_mib']:.0f}" if "duckdb_peak_mib" in r else "-"
        lines.append(f"{name:<15}{r['seconds']:>9.2f}{r['peak_mib']:>10.0f}{duck:>12}"
                     f"{r.get('windows', '-'):>10}{r.get('alerts', '-'):>8}")
    alike = [n for n in ("by_hand", "title", "oracle") if n in results]
    same = {(results[n]["windows"], results[n]["alerts"]) for n in alike}
    if len(alike) > 1:
        lines += ["", ", ".join(alike) + (" agree on windows and alerts" if len(same) == 1
                                          else " DISAGREE on windows or alerts: their ratios mean nothing")]
    lines += ["", f"{'ratio':<22}{'value':>7}{'target':>8}  "]
    for r in found:
        lines.append(f"{r['ratio']:<22}{r['value']:>7.3f}{'<= ' + format(r['target'], 'g'):>8}  "
                     f"{'met' if r['met'] else 'MISSED'}  ({r['meaning']})")
    if "catalogue" in results:
        peak = results["catalogue"]["peak_mib"]
        lines.append(f"{'catalogue peak MiB':<22}{peak:>7.0f}{'<= ' + str(MEMORY_TARGET_MIB):>8}  "
                     f"{'met' if peak <= MEMORY_TARGET_MIB else 'MISSED'}")
    if "hourly" in results:
        h = results["hourly"]
        for what, value in (("median", h["seconds"]), ("max", h["max_seconds"])):
            lines.append(f"{'hourly ' + what + ' s':<22}{value:>7.2f}{'<= ' + format(HOURLY_TARGET, 'g'):>8}  "
                         f"{'met' if value <= HOURLY_TARGET else 'MISSED'}  (a run after each of {HOURS} hourly "
                         "files of the 31st day, after 30 days)")
    if "year" in results and "increment" in results:
        year, month = results["year"]["peak_mib"], results["increment"]["peak_mib"]
        lines.append(f"{'year/increment peak':<22}{year / month:>7.3f}{'<= ' + format(PEAK_FLAT, 'g'):>8}  "
                     f"{'met' if year <= month * PEAK_FLAT else 'MISSED'}  (peak memory flat: {year:.0f} MiB after a "
                     f"year, {month:.0f} MiB after a month)")
    for name in ("title", "catalogue", "increment", "hourly", "year"):
        if name not in results:
            continue
        r = results[name]
        spent = sum(r["stages"].values())
        lines += ["", f"where {name} spends {r['seconds']:.2f} s: {r['load_seconds']:.2f} s loading and validating "
                  f"the project, {spent:.2f} s in the runner's statements"]
        lines += [f"  stage {stage:<12}{secs:8.2f} s  {secs / r['seconds']:6.1%}"
                  for stage, secs in sorted(r["stages"].items(), key=lambda kv: -kv[1])]
        if name != "title":
            lines += [f"  {who:<32}{secs:8.2f} s"
                      for who, secs in sorted(r["checks"].items(), key=lambda kv: -kv[1])]
        lines += ["  slowest statements:"] + [f"    {secs:7.2f} s  {what}" for what, secs in r["top_statements"].items()]
    return "\n".join(lines)


# what each measurement is, in the results page
SHOWN = {
    "floor": "one plain DuckDB GROUP BY over the columns the title check reads",
    "by_hand": "the `title_errors` check written by hand as one DuckDB script, no state kept",
    "title": "`plimsoll run --check title_errors`",
    "oracle": "the same check in plain Python and pandas (the test suite's oracle)",
    "catalogue": "`plimsoll run`, the whole catalogue of the demo",
    "no_causes": "the same without `attributes`: no alert explained (causes are the difference)",
    "first_30_days": "the catalogue over the first 30 days",
    "increment": "`plimsoll run` after one more day lands",
    "hourly": "`plimsoll run` after each of 24 hourly files of that day lands (median; the slowest below)",
    "year_history": "making a year of history from the 30 days (not a run: the set-up for the next row)",
    "year": "`plimsoll run` after the same day lands, after a year of history",
}


def _mib(value: float) -> str:
    return f"{value:,.0f} MiB"


def results_page(figures: dict[str, Any]) -> str:
    """benchmarks/RESULTS.md: the figures of one run (as --json writes them) for people to read."""
    results, limit = figures["results"], figures.get("memory_limit") or "Plimsoll's default (1600MB)"
    about = (f"The last run of `benchmarks/bench.py` (what it measures: DEVELOPERS.md, 'Benchmark'): a "
             f"{figures['days']}-day Fernhill lake of {figures['sessions']:,} sessions, {figures['cores']} cores, "
             f"memory limit {limit}." + (f" {figures['conditions']}" if figures.get("conditions") else ""))
    lines = ["# What a run costs", "", about, *(["", figures["transcribed"]] if figures.get("transcribed") else []), "",
             "Written from the run's figures (`benchmarks/results.json`) by "
             "`python benchmarks/bench.py --page benchmarks/results.json`; the other docs point here.",
             "", "| run | seconds | peak memory |", "| --- | --- | --- |"]
    lines += [f"| {SHOWN[name]} | {r['seconds']:.1f} | {_mib(r['peak_mib'])} |"
              for name, r in results.items() if name in SHOWN]
    lines += ["", "| ratio | value | target |", "| --- | --- | --- |"]
    for r in figures["ratios"]:
        top, bottom = r["ratio"].split("/")
        lines.append(f"| `{r['ratio']}` | {r['value']:.3f} ({results[top]['seconds']:.1f} s / "
                     f"{results[bottom]['seconds']:.1f} s) | ≤ {r['target']:g} |")
    if "catalogue" in results:
        lines.append(f"| catalogue peak | {_mib(results['catalogue']['peak_mib'])} | ≤ {_mib(MEMORY_TARGET_MIB)} |")
    if "hourly" in results:
        h = results["hourly"]
        lines.append(f"| hourly run, median of {len(h.get('runs', [])) or HOURS} | {h['seconds']:.2f} s | ≤ {HOURLY_TARGET:g} s |")
        lines.append(f"| hourly run, slowest | {h['max_seconds']:.2f} s | ≤ {HOURLY_TARGET:g} s |")
    if "year" in results and "increment" in results:
        lines.append(f"| peak after a year / after a month | {_mib(results['year']['peak_mib'])} / "
                     f"{_mib(results['increment']['peak_mib'])} | ≤ {PEAK_FLAT:g} |")
    if figures.get("notes"):
        lines += ["", figures["notes"]]
    return "\n".join(lines) + "\n"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sessions", type=int, default=2_000_000)
    parser.add_argument("--workdir", type=Path, default=None, help="reuse (or build) the lake here")
    parser.add_argument("--json", type=Path, default=None, help="where the figures go (default: WORKDIR/bench.json)")
    parser.add_argument("--skip", action="append", default=[], choices=[*CHILDREN],
                        help="leave a measurement out (repeatable), e.g. the oracle at very large sizes")
    parser.add_argument("--memory-limit", default=None,
                        help="DuckDB memory_limit for every DuckDB measurement (plimsoll.yml's key), e.g. 8GB; default: Plimsoll's default")
    parser.add_argument("--keep-30-days", action="store_true",
                        help="start increment, hourly and year from the warehouse WORKDIR/thirty-days kept by an earlier run")
    parser.add_argument("--page", type=Path, default=None, metavar="JSON",
                        help="print benchmarks/RESULTS.md from the figures of a run (its --json file), then stop")
    parser.add_argument("--child", nargs=2, metavar=("NAME", "WORKDIR"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.page:
        print(results_page(json.loads(args.page.read_text(encoding="utf-8"))), end="")
        return
    if args.child:
        child(args.child[0], Path(args.child[1]))
        return
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="plimsoll-bench-"))
    sessions = prepare(workdir, args.sessions, args.memory_limit)
    results = measure_all(workdir, set(args.skip), args.keep_30_days)
    found = ratios(results)
    print(table(sessions, results, found))
    target = args.json or workdir / "bench.json"
    target.write_text(json.dumps({"sessions": sessions, "days": DAYS, "cores": os.cpu_count(),
                                  "memory_limit": args.memory_limit,
                                  "results": results, "ratios": found}, indent=2), encoding="utf-8")
    print(f"\nfigures written to {target}")


if __name__ == "__main__":
    main()
