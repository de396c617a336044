"""Benchmark: what a Plimsoll run costs against the floor, measured in one run on the same data.

    python benchmarks/bench.py --sessions 2000000 [--workdir DIR]

Builds the Fernhill Broadcasting demo lake at that size (or reuses DIR's), then times, each in a
fresh process so peak memory (max RSS) is its own:

  floor      one plain DuckDB GROUP BY over the columns the title check reads
  title      `plimsoll run --check title_errors` on a fresh warehouse
  catalogue  `plimsoll run` of the whole catalogue on a fresh warehouse
  increment  the catalogue over 20 days, then one incremental run adding the 21st

and prints seconds, peak memory and the ratios title/floor, catalogue/title, increment/catalogue.
With ``--spark MASTER`` (e.g. ``local[2]``) it also times ``spark``: the catalogue with
``engine: spark`` on a fresh warehouse (the Spark driver's memory is not in the peak shown), and
the ratio spark/catalogue. A benchmark, not a test: nothing here asserts a time.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

FLOOR = """
import duckdb, glob, sys
files = sorted(glob.glob(sys.argv[1] + '/lake/sessions/**/*.parquet', recursive=True))
duckdb.sql('''SELECT site, title_id, error_code, count(*), count(*) FILTER (WHERE error_code IS NOT NULL)
              FROM read_parquet($files) WHERE NOT is_bot GROUP BY ALL''', params={'files': files}).fetchall()
"""

RUN = """
import sys
from toolkit.project import load_project
from toolkit.runner import run
project = load_project(sys.argv[1])
run(project, sys.argv[2:] or None)
"""


def measured(code: str, *args: str) -> tuple[float, float]:
    """Seconds and peak resident memory (MiB) of ``code`` run in a child Python."""
    probe = (
        "import resource, runpy, sys, time\n"
        "t = time.perf_counter()\n"
        f"exec(compile({code!r}, 'bench', 'exec'))\n"
        "print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)\n"
    )
    out = subprocess.run([sys.executable, "-c", probe, *args], capture_output=True, text=True, check=True)
    seconds, mib = out.stdout.split()[-2:]
    return float(seconds), float(mib)


def fresh_warehouse(project: Path) -> None:
    for stale in project.parent.glob("warehouse.duckdb*"):
        stale.unlink()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sessions", type=int, default=2_000_000)
    parser.add_argument("--workdir", type=Path, default=None)
    parser.add_argument("--spark", metavar="MASTER", default=None, help="also time engine: spark at this master")
    args = parser.parse_args()
    from toolkit.demo import prepare_workdir, write_project
    from toolkit.warehouse_demo.generate import build_lake

    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="plimsoll-bench-"))
    if not (workdir / "lake").exists():
        prepare_workdir(workdir)
        t = time.perf_counter()
        build_lake(workdir, sessions=args.sessions)
        print(f"lake of {args.sessions:,} sessions built in {time.perf_counter() - t:.1f} s", file=sys.stderr)
    project = write_project(workdir)
    results: dict[str, tuple[float, float]] = {}
    results["floor"] = measured(FLOOR, str(workdir))
    fresh_warehouse(project)
    results["title"] = measured(RUN, str(project), "title_errors")
    fresh_warehouse(project)
    results["catalogue"] = measured(RUN, str(project))

    last_day = sorted((workdir / "lake" / "sessions").iterdir())[-1]
    parked = workdir / "parked-day"
    shutil.move(str(last_day), parked)
    fresh_warehouse(project)
    measured(RUN, str(project))
    shutil.move(str(parked), last_day)
    results["increment"] = measured(RUN, str(project))

    ratios = {
        "title/floor": results["title"][0] / results["floor"][0],
        "catalogue/title": results["catalogue"][0] / results["title"][0],
        "increment/catalogue": results["increment"][0] / results["catalogue"][0],
    }
    if args.spark:
        spark_project = workdir / "plimsoll-spark.yml"
        spark_project.write_text(
            project.read_text().replace("warehouse: warehouse.duckdb", "warehouse: warehouse-spark.duckdb")
            + f"engine: spark\nspark_master: {args.spark}\nspark_conf:\n  spark.sql.shuffle.partitions: 4\n")
        for stale in workdir.glob("warehouse-spark.duckdb*"):
            stale.unlink()
        results["spark"] = measured(RUN, str(spark_project))
        ratios["spark/catalogue"] = results["spark"][0] / results["catalogue"][0]
    for name, (seconds, mib) in results.items():
        print(f"{name:<10} {seconds:8.2f} s  {mib:8.0f} MiB peak")
    for name, value in ratios.items():
        print(f"{name:<20} {value:6.2f}")
    print(json.dumps({"sessions": args.sessions, "results": results, "ratios": ratios}))


if __name__ == "__main__":
    main()
