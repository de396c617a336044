"""Compiling a check into the SQL a run executes, stage by stage, from the templates in ``queries/``.

The compiler only returns text; :mod:`toolkit.engine.runner` only executes what it returns, and
``plimsoll sql`` prints the same text. The verdict stage holds a loop (``-- @loop`` … ``-- @end``,
see :func:`toolkit.sql.templates.stage`) that the runner repeats until the verdicts settle.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

from toolkit.model import Check, Source
from toolkit.runlength import interval_table
from toolkit.sql.script import script
from toolkit.sql.templates import Stage, render, stage

STAGES = ("source", "scan", "window", "measure", "verdict", "impact", "lifecycle", "persist")
CHECK_STAGES = STAGES[1:]


@dataclass(frozen=True)
class CompiledCheck:
    """All the SQL of one check, in order, with a hash that changes when the computation does."""

    check: str
    stages: tuple[Stage, ...]
    definition_hash: str = field(default="")
    source: Source | None = field(default=None, compare=False)

    @property
    def sql(self) -> str:
        """Every statement a run executes for the check, in order, as ``plimsoll sql`` shows it:
        the check's stages, and around them the run's own statements (:mod:`toolkit.sql.script`)."""
        body = (script(self.source, self.stages) if self.source is not None
                else "\n".join(stage.text.rstrip() + "\n" for stage in self.stages))
        return _HEADER.format(check=self.check) + body


_HEADER = """\
-- Plimsoll check {check}: every statement `plimsoll run` executes for it, in order, as shown.
-- Opening the warehouse comes first, as for every command that writes it, and is not repeated
-- here: the settings of queries/connection.sql, the tables of queries/warehouse.sql (made if
-- missing) and, for a file of an earlier layout, its conversion (queries/layout.sql, migrate_*.sql).
-- Parameters: $files (where the new Parquet files are read from), $paths (their names
-- relative to the source's path), $manifest (names, sizes and times), $run_id, $reader (the
-- check whose earlier files decide repeats), $read_until (a backlog read in several runs:
-- the earliest event time left for the next runs, else NULL), $source_checks (the checks of
-- the source), $definition (hash of the SQL up to the verdict stage), $check (the check's name);
-- the run's own statements name theirs. The statements from '@loop' to '@end' are one round,
-- repeated until its last statement returns 0. A named statement ('@statement NAME') runs where
-- its name says: the run's own are in queries/run.sql, the lake's in queries/lake.sql.
"""


def columns_read(checks: list[Check]) -> list[str]:
    """The source columns a set of checks reads, in first-use order (the scan projects only these)."""
    seen: list[str] = []
    for check in checks:
        m = check.measure
        exprs = [e for e in (check.where, m.bad, m.numerator, m.denominator, m.of) if e is not None]
        names = [*check.by, *([m.split] if m.split else []), *(c for e in exprs for c in e.columns)]
        for name in names:
            if name not in seen:
                seen.append(name)
    return seen


def compile_source(checks: list[Check]) -> Stage:
    """The shared first stage: read the new files of one source once for all of ``checks``."""
    sources = {c.source.name for c in checks}
    if len(sources) != 1:
        raise ValueError(f"one source at a time, not {sorted(sources)}")
    return _source_stage(checks)


def _source_stage(checks: list[Check]) -> Stage:
    return stage("source", render("source.sql", source=checks[0].source, columns=columns_read(checks)))


def compile_check(check: Check) -> CompiledCheck:
    """Every stage template rendered for ``check`` (its source stage reading only its own columns):
    DuckDB's plan. :mod:`toolkit.sql.plans` turns it into the plan of the check's engine."""
    context = {
        "check": check,
        "source": check.source,
        "measure": check.measure,
        "window": check.window,
        "baseline": check.baseline,
        "guard": check.guard,
        "lifecycle": check.lifecycle,
        # the CUSUM's decision intervals on a grid of p₀, which the verdict SQL interpolates
        "intervals": (interval_table(float(check.baseline.shift), int(check.baseline.in_control_sessions))
                      if check.baseline.method == "cusum" else ()),
    }
    stages = (_source_stage([check]),) + tuple(stage(name, render(f"{name}.sql", **context)) for name in CHECK_STAGES)
    return CompiledCheck(check.name, stages, definition_hash(stages), check.source)


def definition_hash(stages: tuple[Stage, ...]) -> str:
    """A hash of the DuckDB SQL that forms the check's windows and verdicts (stages source to verdict).

    When it changes, windows already stored no longer match what the check computes, so the
    runner asks for a rebuild. The impact, the life cycle and severity may change without one: they
    only shape alerts from now on.
    """
    computing = [s.text for s in stages if s.name not in ("impact", "lifecycle", "persist")]
    return hashlib.sha256("\n".join(computing).encode()).hexdigest()[:16]
