"""Hostile YAML: check files, plimsoll.yml and command-line values that try to exhaust memory, blow the
stack or reach Python through a tag are refused with one line naming the file and line, quickly, with
no traceback and nothing written; anchors and aliases used sensibly still work.

The hostile files run through the installed ``plimsoll`` command as real processes, so what is
checked is exactly what a user sees: the exit code, stderr, and that the process ends (the 10 s
bound only proves it does not hang; it is no timing).
"""

from __future__ import annotations

import subprocess
import textwrap
from pathlib import Path

import pytest
from conftest import PROJECT, FIXTURE_LAKE, plimsoll_command, write_project

from toolkit.backtest.settings import parse_override
from toolkit.problems import ProjectInvalid
from toolkit.config.project import load_project
from toolkit.config.yamlsource import MAX_ALIAS_VALUES, MAX_DEPTH, Refused, load, parse_value

GOOD = textwrap.dedent("""\
    check: title_errors
    about: A title fails.
    source: sessions
    by: [site, title_id]
    measure:
      kind: rate
      bad: error_code IS NOT NULL
    window:
      sessions: 50
      max_wait: 3h
    baseline:
      method: rolling_percentile
      q: 0.9
      history: 20
      min_history: 3
    """)


def laughs(levels: int = 9) -> str:
    """Nested anchors: each level a list of nine aliases of the level before, 9**levels strings."""
    names = "abcdefghijklmnopqrstuvwxyz"
    lines = [f"{names[0]}: &{names[0]} [lol, lol, lol, lol, lol, lol, lol, lol, lol]"]
    for i in range(1, levels):
        lines.append(f"{names[i]}: &{names[i]} [{', '.join(['*' + names[i - 1]] * 9)}]")
    return "\n".join(lines) + "\n"


# Counting values as the screen does (each list 1 plus its items, an alias the size of its anchor):
# a is 10, b adds 9 x 10, c 9 x 91, d 9 x 820 (8,289 added in all); the first alias on line 5 (*d,
# 7,381 more) takes the file past 10,000 added values.
BOMB_LINE = 5
DEEP = 5000

HOSTILE = [
    ("alias-bomb", laughs() + GOOD, BOMB_LINE,
     f"alias *d: aliases would add more than {MAX_ALIAS_VALUES:,} values to this file"),
    ("deep-flow", GOOD.replace("by: [site, title_id]", "by: " + "[" * DEEP + "site" + "]" * DEEP), 4,
     f"nesting deeper than {MAX_DEPTH} levels is not read"),
    ("deep-block", GOOD + "guard:\n" + "".join("  " * (i + 1) + f"k{i}:\n" for i in range(DEEP)),
     17 + MAX_DEPTH - 1, f"nesting deeper than {MAX_DEPTH} levels is not read"),
    ("python-object", GOOD.replace("about: A title fails.", 'about: !!python/object/apply:os.system ["echo hi"]'),
     2, "tag !!python/object/apply:os.system is not allowed: only YAML's standard tags are read"),
    ("python-name", GOOD.replace("about: A title fails.", "about: !!python/name:os.system"),
     2, "tag !!python/name:os.system is not allowed: only YAML's standard tags are read"),
]


def validate(folder: Path) -> subprocess.CompletedProcess:
    return subprocess.run(plimsoll_command("validate", "-p", "plimsoll.yml"), cwd=folder, capture_output=True,
                          text=True, timeout=10)


@pytest.mark.parametrize("text,line,words", [h[1:] for h in HOSTILE], ids=[h[0] for h in HOSTILE])
def test_a_hostile_check_file_is_one_line_with_its_line_from_the_real_command(tmp_path: Path, text: str,
                                                                              line: int, words: str) -> None:
    write_project(tmp_path, {"hostile.yml": text})
    result = validate(tmp_path)
    assert result.returncode == 2, result.stderr[-2000:]
    assert "Traceback" not in result.stderr
    assert result.stderr.splitlines() == [result.stderr.strip()]
    assert result.stderr.startswith(f"checks/hostile.yml:{line}: {words}"), result.stderr[:500]
    assert result.stdout == ""  # nothing ran: os.system would have printed "hi" there
    assert sorted(p.name for p in tmp_path.iterdir()) == ["checks", "plimsoll.yml"]


def test_a_hostile_project_file_is_one_line_with_its_line_from_the_real_command(tmp_path: Path) -> None:
    project = PROJECT.format(lake=FIXTURE_LAKE).replace("checks: checks/\n", "checks: checks/\n" + laughs())
    write_project(tmp_path, {"title_errors.yml": GOOD}, project)
    result = validate(tmp_path)
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert result.stderr.strip() == (f"plimsoll.yml:{BOMB_LINE + 2}: alias *d: aliases would add more than "
                                     f"{MAX_ALIAS_VALUES:,} values to this file (anchors nested in anchors); "
                                     "write the values out")


@pytest.mark.parametrize("value,words", [
    ("!!python/name:os.system", "tag !!python/name:os.system is not allowed"),
    ("!!python/object/apply:os.system [echo hi]", "tag !!python/object/apply:os.system is not allowed"),
    ("[" * DEEP + "]" * DEEP, f"nesting deeper than {MAX_DEPTH} levels is not read"),
    ("[&a [x, x, x, x, x, x, x, x, x], &b [*a, *a, *a, *a, *a, *a, *a, *a, *a], "
     "&c [*b, *b, *b, *b, *b, *b, *b, *b, *b], &d [*c, *c, *c, *c, *c, *c, *c, *c, *c], "
     "&e [*d, *d, *d, *d, *d, *d, *d, *d, *d], &f [*e, *e, *e, *e, *e, *e, *e, *e, *e]]",
     "alias *d: aliases would add more than"),
    ("&a [*a]", "alias *a refers to a value that contains it"),
])
def test_a_hostile_value_on_the_command_line_is_refused_by_the_real_command(tmp_path: Path, value: str,
                                                                            words: str) -> None:
    # settings are read before the project, so none is needed
    result = subprocess.run(plimsoll_command("backtest", "title_errors", "--from", "2026-11-02", "--to", "2026-11-03",
                                             "--set", f"by={value}"),
                            cwd=tmp_path, capture_output=True, text=True, timeout=10)
    assert result.returncode == 2 and "Traceback" not in result.stderr
    (line,) = result.stderr.splitlines()
    assert line.startswith("--set by=") and f": the value is refused: {words}" in line, line
    assert len(line) < 400
    assert list(tmp_path.iterdir()) == []


def test_parse_value_refuses_what_files_refuse() -> None:
    with pytest.raises(Refused, match="duplicate key 'a'"):
        parse_value("{a: 1, a: 2}")
    with pytest.raises(Refused, match=r"cannot read 'abc' as !!int"):
        parse_value("!!int abc")
    assert parse_override("by=!!str 12").value == "12"
    assert parse_value("[site, cdn]") == ["site", "cdn"]


def load_text(tmp_path: Path, text: str):
    path = tmp_path / "x.yml"
    path.write_bytes(text.encode("utf-8"))
    return load(path, "x.yml")


@pytest.mark.parametrize("text,line,words", [
    ("a: 1\nb: &x [1, *x]\n", 2, "alias *x refers to a value that contains it"),
    ("a: 1\nb: !!binary aGk=\n", 2, "tag !!binary is not allowed"),
    ("a: 1\nb: !local x\n", 2, "tag !local is not allowed"),
    ("a: 1\nb: x\x01y\n", 2, "YAML syntax: character #x0001 is not allowed: special characters are not allowed"),
    ("a: 1\nb: 2026-13-45\n", 2, "cannot read '2026-13-45' as !!timestamp: month must be in 1..12"),
    ("a: 1\nb: !!float many\n", 2, "cannot read 'many' as !!float"),
    ("a: 1\n? {k: v}\n: 2\n", 2, "keys must be text, not a mapping"),
])
def test_other_yaml_that_ended_in_a_traceback_is_a_problem_with_its_line(tmp_path: Path, text: str, line: int,
                                                                        words: str) -> None:
    _, problems = load_text(tmp_path, text)
    assert [(p.line, p.message) for p in problems] == [(line, words)] or \
        (len(problems) == 1 and problems[0].line == line and problems[0].message.startswith(words)), problems


def test_nesting_up_to_the_bound_is_read(tmp_path: Path) -> None:
    # the document's own mapping is the first level
    nested = MAX_DEPTH - 1
    doc, problems = load_text(tmp_path, "a: " + "[" * nested + "x" + "]" * nested + "\n")
    assert problems == [] and str(doc.data["a"]).count("[") == nested
    _, problems = load_text(tmp_path, "a: " + "[" * (nested + 1) + "x" + "]" * (nested + 1) + "\n")
    assert [p.message for p in problems] == [f"nesting deeper than {MAX_DEPTH} levels is not read; "
                                             "a Plimsoll file needs a few"]


def test_anchors_and_aliases_used_sensibly_still_work(tmp_path: Path) -> None:
    check = textwrap.dedent("""\
        check: title_errors
        about: A title fails.
        source: sessions
        where: &titled title_id IS NOT NULL AND site IS NOT NULL
        by: &key [site, title_id]
        measure:
          kind: rate
          bad: error_code IS NOT NULL AND title_id IS NOT NULL
        window:
          sessions: &size 40
          max_wait: &wait 3h
        baseline:
          method: rolling_percentile
          q: 0.9
          history: &history 20
          min_history: 3
        guard:
          min_sessions: *size
        lifecycle:
          expire_after: *wait
          recover_after: 2
        """)
    project = textwrap.dedent(f"""\
        warehouse: warehouse.duckdb
        checks: checks/
        sources:
          sessions: &source
            path: {FIXTURE_LAKE}
            session_id: &id session_id
            event_time: &time ended_at
            exclude: is_bot
          replayed: *source
          raw:
            path: {FIXTURE_LAKE}
            session_id: *id
            event_time: *time
        webhooks:
          - {{name: on-call, url: "http://127.0.0.1:9/a", timeout: &timeout 5s}}
          - {{name: archive, url: "http://127.0.0.1:9/b", timeout: *timeout}}
        """)
    loaded = load_project(write_project(tmp_path, {"title_errors.yml": check}, project))
    checked = loaded.checks["title_errors"]
    assert checked.window.sessions == checked.guard.min_sessions == 40
    assert checked.window.max_wait == checked.lifecycle.expire_after
    assert checked.by == ("site", "title_id")
    assert loaded.sources["replayed"].path == loaded.sources["sessions"].path
    assert loaded.sources["replayed"].exclude.sql == loaded.sources["sessions"].exclude.sql
    assert loaded.sources["raw"].session_id == "session_id" and loaded.sources["raw"].exclude is None
    assert [w.timeout for w in loaded.webhooks] == [loaded.webhooks[0].timeout] * 2


def test_a_wrong_value_behind_an_alias_is_refused_at_each_key_that_uses_it(tmp_path: Path) -> None:
    check = GOOD.replace("  history: 20", "  history: &h twenty").replace("  min_history: 3", "  min_history: *h")
    with pytest.raises(ProjectInvalid) as caught:
        load_project(write_project(tmp_path, {"title_errors.yml": check}))
    assert [(p.line, p.message) for p in caught.value.problems] == [
        (14, "baseline.history: expected a whole number, got text 'twenty'"),
        (15, "baseline.min_history: expected a whole number, got text 'twenty'")]
