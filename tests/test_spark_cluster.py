"""engine: spark on a Spark standalone cluster: a master and one worker on 127.0.0.1, started from
the installed pyspark package alone, whose executors are JVMs of their own (and have no Python).

Local mode runs the driver and the executors in one JVM, so whatever a step keeps on the driver
(a file, a Python object, a setting of the driver's JVM) reaches the executors there by accident. On
a cluster it does not. The worker runs in a time zone far from UTC, so a step that leaned on the
executors' own zone would give other windows. Two checks (count windows with a split rate, time
windows with a quantile) over the small shared demo lake, in two runs, against one DuckDB run, row for row.

The cluster is started once for the module and stopped in its teardown, whatever the tests did:
both process groups are killed (the worker's executors are in its group) and the test fails if any
process of them is left. Marked ``spark``: it runs in CI, needing Java 17 and pyspark only.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import textwrap
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from pathlib import Path

import pytest

from test_spark import assert_same_results, compare, project
from toolkit.config.project import load_project
from toolkit.engine.runner import run

pytestmark = pytest.mark.spark

# The catalogue's title and device checks with windows and guards scaled to the small demo lake, so
# it raises alerts: count windows with a split rate (the walk from span to span goes through the
# warehouse and back), and time windows with a quantile (Spark's exact percentile).
CHECKS = {
    "title_errors.yml": """\
        check: title_errors
        source: sessions
        where: title_id IS NOT NULL
        by: [site, title_id]
        measure: {kind: rate, bad: error_code IS NOT NULL, split: error_code}
        window: {sessions: 50, max_wait: 2d}
        baseline: {method: rolling_percentile, q: 0.9, history: 30, min_history: 4, factor: 2.0, floor: 0.05}
        guard: {min_sessions: 25, min_bad: 4}
        """,
    "startup_time_by_device.yml": """\
        check: startup_time_by_device
        source: sessions
        where: startup_ms IS NOT NULL
        by: [device_family]
        measure: {kind: quantile, of: startup_ms, q: 0.9}
        window: {every: 1h, lateness: 30m}
        baseline: {method: rolling_percentile, q: 0.95, history: 168, min_history: 24, factor: 1.4}
        guard: {min_sessions: 15}
        """,
}
START_TIMEOUT = 120.0           # seconds for the master and the worker to start and register
STOP_TIMEOUT = 20.0             # seconds for a killed process group to be gone
WORKER_TIME_ZONE = "Pacific/Chatham"  # UTC+12:45 or +13:45: nobody's default
# The driver runs in the test process; it binds to 127.0.0.1 like the cluster, and asks for what one
# worker of one core and 1 GiB has. The executors are given no Python: every step on Spark is SQL,
# so a step that needed a Python worker there (a UDF, an RDD of Python objects) fails the test.
NO_PYTHON = "/nonexistent/python-on-the-executors"
CLUSTER_CONF = f"""\
engine: spark
spark_master: {{url}}
spark_conf:
  spark.driver.host: 127.0.0.1
  spark.driver.bindAddress: 127.0.0.1
  spark.pyspark.python: {NO_PYTHON}
  spark.executorEnv.PYSPARK_PYTHON: {NO_PYTHON}
  spark.executor.memory: 768m
  spark.executor.cores: 1
  spark.cores.max: 1
  spark.sql.shuffle.partitions: 4
  spark.sql.codegen.wholeStage: false
"""


@dataclass(frozen=True)
class Cluster:
    url: str                 # spark://127.0.0.1:PORT
    web_ui: str              # http://127.0.0.1:PORT of the master
    logs: tuple[Path, ...]
    started_in: float        # seconds until the worker had registered

    def state(self) -> dict:
        with urllib.request.urlopen(f"{self.web_ui}/json/", timeout=5) as answer:
            return json.load(answer)

    def project_conf(self) -> str:
        return CLUSTER_CONF.format(url=self.url)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _spark_home() -> Path:
    import pyspark

    return Path(pyspark.__file__).parent


def _tails(logs: tuple[Path, ...], lines: int = 40) -> str:
    out = []
    for log in logs:
        text = log.read_text(encoding="utf-8", errors="replace").splitlines() if log.exists() else []
        out.append(f"── {log.name} (last {lines} lines) ──\n" + "\n".join(text[-lines:]))
    return "\n".join(out)


def _members(group: int) -> list[int]:
    """The live processes of a process group (Linux's /proc): a zombie is dead, whoever reaps it."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:  # gone meanwhile
            continue
        state, _, pgrp = stat[stat.rindex(")") + 2:].split()[:3]
        if int(pgrp) == group and state != "Z":
            found.append(int(entry.name))
    return found


def _stop(processes: list[subprocess.Popen]) -> list[int]:
    """Kill each process group (TERM, then KILL): the master, the worker and the worker's
    executors; the processes still alive after that."""

    def left() -> list[int]:
        for proc in processes:
            proc.poll()  # reap the leaders we started
        return [pid for proc in processes for pid in _members(proc.pid)]

    for signal_number in (signal.SIGTERM, signal.SIGKILL):
        for proc in processes:
            if _members(proc.pid):
                os.killpg(proc.pid, signal_number)
        deadline = time.monotonic() + STOP_TIMEOUT / 2
        while left() and time.monotonic() < deadline:
            time.sleep(0.1)
    return left()


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory):
    """A standalone master and one worker (1 core, 1 GiB) on free ports of 127.0.0.1."""
    from toolkit.engine import spark as spark_engine

    home = _spark_home()
    folder = tmp_path_factory.mktemp("spark-cluster")
    port, ui, worker_ui = _free_port(), _free_port(), _free_port()
    env = {**os.environ, "SPARK_HOME": str(home), "SPARK_LOCAL_IP": "127.0.0.1",
           "SPARK_LOG_DIR": str(folder / "logs"), "SPARK_LOCAL_DIRS": str(folder / "scratch"),
           "TZ": WORKER_TIME_ZONE}
    spark_class = str(home / "bin" / "spark-class")
    commands = {
        "master": [spark_class, "org.apache.spark.deploy.master.Master", "--host", "127.0.0.1",
                   "--port", str(port), "--webui-port", str(ui)],
        "worker": [spark_class, "org.apache.spark.deploy.worker.Worker", f"spark://127.0.0.1:{port}",
                   "--host", "127.0.0.1", "--cores", "1", "--memory", "1g", "--webui-port", str(worker_ui),
                   "--work-dir", str(folder / "work")],
    }
    logs = tuple(folder / f"{name}.log" for name in commands)
    processes: list[subprocess.Popen] = []
    began = time.monotonic()
    try:
        for (name, command), log in zip(commands.items(), logs):
            with open(log, "wb") as out:  # the child keeps its own copy of the descriptor
                processes.append(subprocess.Popen(command, env=env, stdout=out, stderr=subprocess.STDOUT,
                                                  stdin=subprocess.DEVNULL, start_new_session=True))
        found = Cluster(f"spark://127.0.0.1:{port}", f"http://127.0.0.1:{ui}", logs, 0.0)
        while True:
            try:
                if found.state().get("aliveworkers", 0) >= 1:
                    break
            except (urllib.error.URLError, OSError, ValueError):
                pass
            dead = [f"{name} exited with {p.returncode}" for name, p in zip(commands, processes)
                    if p.poll() is not None]
            if dead or time.monotonic() - began > START_TIMEOUT:
                why = "; ".join(dead) or f"no worker registered within {START_TIMEOUT:.0f} s"
                pytest.fail(f"the Spark standalone cluster did not start: {why}\n{_tails(logs)}", pytrace=False)
            time.sleep(0.25)
        found = Cluster(found.url, found.web_ui, logs, time.monotonic() - began)
        print(f"\nSpark standalone cluster at {found.url}: worker registered after {found.started_in:.1f} s")
        yield found
    finally:
        spark_engine.stop()  # the driver first, so it does not wait on a cluster that is gone
        left = _stop(processes)
        if left:
            pytest.fail(f"processes of the Spark cluster still alive after kill: {left}", pytrace=False)


@pytest.fixture(scope="module")
def checks(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("checks")
    for name, text in CHECKS.items():
        (folder / name).write_text(textwrap.dedent(text), encoding="utf-8")
    return folder


@pytest.fixture(scope="module")
def duckdb_once(tmp_path_factory: pytest.TempPathFactory, small_fernhill_lake, checks: Path) -> Path:
    """The two checks over the whole small demo lake in one DuckDB run: the reference."""
    file = project(tmp_path_factory.mktemp("duckdb"), small_fernhill_lake.path, checks)
    run(load_project(file))
    return file.parent / "warehouse.duckdb"


def test_a_standalone_cluster_gives_duckdbs_windows_and_alerts(tmp_path: Path, cluster: Cluster, small_fernhill_lake,
                                                                 checks: Path, duckdb_once: Path) -> None:
    """Half the days, then the rest, on the cluster's executors: the files they read, the state that
    goes from the warehouse into Spark (carried windows, the series' last windows, watermarks) and
    back, equal to one DuckDB run."""
    from toolkit.engine import spark as spark_engine

    days = small_fernhill_lake.days()
    lake = tmp_path / "lake"
    for day in days[: len(days) // 2]:
        shutil.copytree(day, lake / day.name)
    file = project(tmp_path / "spark", lake, checks, cluster.project_conf())
    loaded = load_project(file)
    first = run(loaded)
    for day in days[len(days) // 2:]:
        shutil.copytree(day, lake / day.name)
    second = run(load_project(file))
    assert (first.status, second.status) == ("ok", "ok")
    assert (first.files_read, second.files_read) == (len(days) // 2, len(days) - len(days) // 2)
    # it ran on the cluster: the session's master is the cluster's, and the master knows the app
    engine = next(iter(loaded.sources.values())).engine
    assert spark_engine.session(engine).sparkContext.master == cluster.url
    apps = [a["name"] for a in cluster.state()["activeapps"]]
    assert apps == ["plimsoll"], (apps, _tails(cluster.logs))
    assert_same_results(compare(duckdb_once, file.parent / "warehouse.duckdb"), min_windows=3_000)


def test_a_project_on_another_master_gets_its_own_spark_session(cluster: Cluster) -> None:
    """One Spark context per process: a second engine setting stops the first one's session rather
    than being handed it (a cluster project would otherwise run in the local session of an earlier
    project, or the reverse, without a word)."""
    from toolkit.engine import spark as spark_engine
    from toolkit.model import Engine

    local = Engine("spark", "local[1]", (("spark.sql.shuffle.partitions", "2"),))
    on_cluster = Engine("spark", cluster.url, (("spark.driver.host", "127.0.0.1"),
                                               ("spark.driver.bindAddress", "127.0.0.1"),
                                               ("spark.executor.memory", "768m"), ("spark.cores.max", "1")))
    assert spark_engine.session(local).sparkContext.master == "local[1]"
    spark = spark_engine.session(on_cluster)
    assert spark.sparkContext.master == cluster.url
    assert spark.sql("SELECT count(*) FROM range(1000)").collect()[0][0] == 1000
    assert "plimsoll" in [a["name"] for a in cluster.state()["activeapps"]]
    assert spark_engine.session(local).sparkContext.master == "local[1]"
