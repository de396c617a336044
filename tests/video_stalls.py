"""The video-stall cases (tests/data/video_stalls): each loaded as a small lake and its labelled
minute explained against the minutes before it, scored as the dataset's README scores it.

Source: minute-by-minute stall counts from a live online-video service, published with "RobustSpot"
(Sun et al., IEEE Transactions on Services Computing, 2023, doi 10.1109/TSC.2022.3155500) in the
public repositories FRPv6/RobustSpot and shaido987/riskloc, MIT licence (LICENSE beside the data).
90 cases; the rows of every case are in cases.parquet (case_name, minute as unix seconds, stalled
viewers, all viewers, and the leaf's attributes; an attribute a case does not have is NULL), the
labels in labels.yaml as published.

A case is a hit at k when every labelled element is among the first k answers, an element matching
when it fixes exactly the labelled attribute values. The exact-set F1 compares the significant
answers with the labelled set, over all cases (micro-averaged).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import duckdb
import yaml

from toolkit.config.project import load_project
from toolkit.engine.explain import Cause, explain_rows

DATA = Path(__file__).parent / "data" / "video_stalls"
ATTRIBUTES = ("cdn", "bitrate", "p2p", "device", "isp")

PROJECT = """\
warehouse: warehouse.duckdb
sources:
  stalls:
    path: lake
    session_id: leaf_minute
    event_time: minute_at
    attributes: [{attributes}]
"""

CHECK = """\
check: stalls
source: stalls
measure: {kind: ratio, numerator: stalled, denominator: viewers}
window: {every: 1m}
baseline: {method: rolling_percentile, q: 0.9, history: 60, min_history: 1, factor: 1.5}
"""


@dataclass
class Outcome:
    case: str
    labelled: list[dict[str, str]]
    causes: list[Cause]

    def hit(self, k: int) -> bool:
        answers = [c.key for c in self.causes[:k]]
        return all(label in answers for label in self.labelled)


def labels() -> dict[str, tuple[int, list[dict[str, str]]]]:
    raw = yaml.safe_load((DATA / "labels.yaml").read_text(encoding="utf-8"))
    return {c["case"]: (c["anomaly_minute"], [{k: str(v) for k, v in e.items()} for e in c["cause"]]) for c in raw}


def utc(seconds: int) -> datetime:
    return datetime.fromtimestamp(seconds, tz=timezone.utc).replace(tzinfo=None)


def explain_case(folder: Path, case: str, minute: int, con: duckdb.DuckDBPyConnection) -> list[Cause]:
    """Write the case as a lake in ``folder``, load its project, explain the labelled minute."""
    (folder / "lake").mkdir(parents=True, exist_ok=True)
    (folder / "checks").mkdir(exist_ok=True)
    present = [a for a in ATTRIBUTES if con.execute(
        f"SELECT count({a}) FROM read_parquet($p) WHERE case_name = $c", {"p": str(DATA / "cases.parquet"),
                                                                           "c": case}).fetchone()[0]]
    columns = ", ".join(present)
    con.execute(
        f"COPY (SELECT minute || '/' || row_number() OVER (PARTITION BY minute ORDER BY {columns}) AS leaf_minute, "
        f"make_timestamp(minute * 1000000) AS minute_at, stalled, viewers, {columns} "
        f"FROM read_parquet($p) WHERE case_name = $c) TO '{folder / 'lake' / 'part.parquet'}' (FORMAT parquet)",
        {"p": str(DATA / "cases.parquet"), "c": case})
    (folder / "plimsoll.yml").write_text(PROJECT.format(attributes=columns), encoding="utf-8")
    (folder / "checks" / "stalls.yml").write_text(CHECK, encoding="utf-8")
    project = load_project(folder / "plimsoll.yml")
    check = project.checks["stalls"]
    minutes = [m for (m,) in con.execute(
        "SELECT DISTINCT minute FROM read_parquet($p) WHERE case_name = $c AND minute < $m ORDER BY 1",
        {"p": str(DATA / "cases.parquet"), "c": case, "m": minute}).fetchall()]
    history = [(utc(m), utc(m + 60)) for m in minutes]
    work = duckdb.connect()
    try:
        return explain_rows(work, check, [str(folder / "lake" / "part.parquet")], utc(minute), utc(minute + 60),
                            history, check.attributes)
    finally:
        work.close()


def score_all(folder: Path) -> tuple[list[Outcome], dict[str, float]]:
    con = duckdb.connect()
    outcomes = []
    for case, (minute, labelled) in sorted(labels().items()):
        causes = explain_case(folder / case.replace(" ", "_"), case, minute, con)
        outcomes.append(Outcome(case, labelled, causes))
    con.close()
    n = len(outcomes)
    tp = sum(sum(1 for c in o.causes if c.significant and c.key in o.labelled) for o in outcomes)
    predicted = sum(sum(1 for c in o.causes if c.significant) for o in outcomes)
    actual = sum(len(o.labelled) for o in outcomes)
    figures = {f"top{k}": sum(o.hit(k) for o in outcomes) / n for k in (1, 3, 5)}
    figures["f1"] = 2 * tp / (predicted + actual) if predicted + actual else 0.0
    return outcomes, figures
