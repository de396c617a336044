"""The golden cases of ``tests/golden/`` (listed in ``cases.toml``): what each compiles to, stage by
stage, and what a run of it gives; shared by ``tests/test_golden.py``, ``tests/test_spark_sql.py``
and ``tests/golden/regenerate.py``.

A case's expected SQL is what ``plimsoll sql`` prints, cut into pieces: each stage of
:data:`toolkit.sql.compiler.STAGES` as printed (with what the run does inside it, such as a move
between its connections), and ``script``, the rest (the run's own statements) with a marker line
where each stage goes. A case folder holds the file of a piece only where the case's text differs
from the case it is ``like``; :func:`expected_file` follows that chain, :func:`assemble` puts the
pieces together again.
"""

from __future__ import annotations

import difflib
import shutil
import tempfile
import tomllib
from dataclasses import dataclass
from functools import cache
from pathlib import Path

import duckdb
import yaml

from conftest import FIXTURE_LAKE, PROJECT, write_project
from toolkit.config.project import load_project
from toolkit.engine.runner import run
from toolkit.sql.compiler import STAGES
from toolkit.engine.explain import after_checks_sql
from toolkit.sql.plans import check_plan
from toolkit.sql.script import with_after_checks

GOLDEN = Path(__file__).parent / "golden"
SCRIPT = "script"
PIECES = (SCRIPT, *STAGES)
SPARK_PROJECT = "engine: spark\nspark_master: local[2]\n" + PROJECT

WINDOW_COLUMNS = ("key_text, split_value, window_number, window_start, window_end, sessions, bad, "
                  "round(value, 9) AS value, round(statistic, 9) AS statistic, round(baseline, 9) AS baseline, "
                  "history_windows, round(threshold, 9) AS threshold, breach")
ALERT_COLUMNS = ("alert_id, key_text, split_value, status, close_reason, opened_at, last_breach_at, "
                 "closed_at, breach_windows, affected_sessions, round(affected_per_hour, 6) AS affected_per_hour, "
                 "round(peak_value, 9) AS peak_value, "
                 "round(threshold, 9) AS threshold, fingerprint")


@dataclass(frozen=True)
class Case:
    """One folder of ``tests/golden/``: a check, the case it is like, the stages pinned on Spark."""

    name: str
    like: str | None
    spark: tuple[str, ...]

    @property
    def folder(self) -> Path:
        return GOLDEN / self.name

    @property
    def check_file(self) -> Path:
        return self.folder / "check.yml"

    @property
    def check_name(self) -> str:
        return yaml.safe_load(self.check_file.read_text())["check"]


def cases() -> dict[str, Case]:
    """``cases.toml`` in its order; a case is only like one listed before it."""
    listed = tomllib.loads((GOLDEN / "cases.toml").read_text())
    out: dict[str, Case] = {}
    for name, entry in listed.items():
        entry = entry or {}
        like = entry.get("like")
        if like is not None and like not in out:
            raise ValueError(f"tests/golden/cases.toml: {name} is like {like!r}, which is not listed before it")
        out[name] = Case(name, like, tuple(entry.get("spark", ())))
    return out


def case_project(check_file: Path, folder: Path, project: str = PROJECT) -> Path:
    """A project over the fixture lake in ``folder`` holding one check file (``project``: its text)."""
    path = write_project(folder, {}, project.format(lake=FIXTURE_LAKE))
    shutil.copyfile(check_file, folder / "checks" / check_file.name)
    return path


def marker(stage: str) -> str:
    """The line that stands for a stage in the ``script`` piece."""
    return f"-- ▶ golden: stage {stage} is printed here, as in {stage}.sql\n"


def _common_lines(printed: str, at: int, text: str) -> int:
    """How much of ``text``, in whole lines, ``printed`` holds from ``at`` on."""
    n = 0
    for line in text.splitlines(keepends=True):
        if not printed.startswith(line, at + n):
            break
        n += len(line)
    return n


def printed_extent(printed: str, text: str, start: int) -> tuple[int, int]:
    """Where a stage's text is printed, from ``start`` on: from its first line to its last, with what
    the run prints inside it (whole lines the stage's text does not hold)."""
    begin = printed.find(text[:text.index("\n") + 1], start)
    if begin < 0:
        raise AssertionError(f"a stage beginning {text.splitlines()[0]!r} is not printed")
    at, rest = begin, text
    while True:
        common = _common_lines(printed, at, rest)
        if common == len(rest):
            return begin, at + common
        if common == 0:
            raise AssertionError(f"the stage's text from {rest.splitlines()[0]!r} on is not printed next")
        at, rest = at + common, rest[common:]
        at = printed.find("".join(rest.splitlines(keepends=True)[:3]), at)   # where the stage resumes
        if at < 0:
            raise AssertionError(f"the stage's text from {rest.splitlines()[0]!r} on is not printed")


def printed_pieces(printed: str, stages: list[str], texts: list[str]) -> dict[str, str]:
    """``printed`` cut into ``script`` (the rest, each stage a marker line) and each stage as printed."""
    script, pieces, cursor = [], {}, 0
    for name, text in zip(stages, texts):
        begin, end = printed_extent(printed, text, cursor)
        script += [printed[cursor:begin], marker(name)]
        pieces[name] = printed[begin:end]
        cursor = end
    script.append(printed[cursor:])
    out = {SCRIPT: "".join(script), **pieces}
    if any(marker(name) in printed for name in stages) or assemble(out) != printed:
        raise AssertionError("the pieces do not put together what plimsoll sql prints")
    return out


def assemble(pieces: dict[str, str]) -> str:
    """What ``plimsoll sql`` prints, from the ``script`` piece and the stages'."""
    text = pieces[SCRIPT]
    for name in STAGES:
        if text.count(marker(name)) != 1:
            raise AssertionError(f"the script piece must mark stage {name} once")
        text = text.replace(marker(name), pieces[name])
    return text


def script_pieces(check_file: Path, folder: Path, project: str = PROJECT) -> dict[str, str]:
    """What ``plimsoll sql`` prints for the check, cut into pieces."""
    loaded = load_project(case_project(check_file, folder, project))
    (name,) = loaded.checks
    compiled = check_plan(loaded.checks[name])
    printed = with_after_checks(compiled.sql, after_checks_sql(loaded.checks[name]), loaded.checks[name].source)
    return printed_pieces(printed, [s.name for s in compiled.stages], [s.text for s in compiled.stages])


def spark_stages(check_file: Path, folder: Path) -> dict[str, str]:
    """The check's stages as ``plimsoll sql`` prints them with ``engine: spark``."""
    pieces = script_pieces(check_file, folder, SPARK_PROJECT)
    return {name: text for name, text in pieces.items() if name != SCRIPT}


@cache
def compiled(case: str) -> dict[str, str]:
    """A case's pieces (compiled once per process)."""
    with tempfile.TemporaryDirectory() as tmp:
        return script_pieces(cases()[case].check_file, Path(tmp))


@cache
def compiled_spark(case: str) -> dict[str, str]:
    with tempfile.TemporaryDirectory() as tmp:
        return spark_stages(cases()[case].check_file, Path(tmp))


def pinned(case: Case, pieces: dict[str, dict[str, str]]) -> list[str]:
    """The pieces a case's folder holds: all for a case like none, else those that differ from its
    parent's. ``pieces`` maps each case name (the parent's at least) to its compiled pieces."""
    if case.like is None:
        return list(pieces[case.name])
    return [p for p, text in pieces[case.name].items() if pieces[case.like].get(p) != text]


def expected_file(case: Case, piece: str) -> Path:
    """The file holding a piece of the case's SQL: its own, else the one of the case it is like."""
    all_cases = cases()
    while True:
        path = case.folder / f"{piece}.sql"
        if path.exists() or case.like is None:
            return path
        case = all_cases[case.like]


def result_tables(check_file: Path, folder: Path) -> tuple[str, str]:
    """The windows and alerts of one run over the fixture lake, as CSV text."""
    project = load_project(case_project(check_file, folder))
    run(project)
    con = duckdb.connect(str(project.warehouse), read_only=True)
    try:
        windows = con.execute(
            f"SELECT {WINDOW_COLUMNS} FROM windows ORDER BY key_text, split_value NULLS FIRST, window_number").df()
        alerts = con.execute(f"SELECT {ALERT_COLUMNS} FROM alerts ORDER BY opened_at, key_text, split_value").df()
    finally:
        con.close()
    return windows.to_csv(index=False), alerts.to_csv(index=False)


def diff(expected: str, actual: str, path: Path, now: str = "what the code gives now") -> str:
    """A unified diff from the committed file to what the code gives now, for a failing test."""
    lines = difflib.unified_diff(expected.splitlines(keepends=True), actual.splitlines(keepends=True),
                                 f"{path} (committed)", now)
    return "".join(lines) or "(they differ only in line endings)"
