"""A check's plan for the engine it runs on: DuckDB's compiled stages, turned into Spark's where the
project's engine is Spark (:mod:`toolkit.sql.spark`). The runner and ``plimsoll sql`` take their
plans from here; the definition hash stays DuckDB's, so switching engines keeps a check's state.
"""

from __future__ import annotations

from dataclasses import replace

from toolkit.model import Check
from toolkit.sql.compiler import CompiledCheck, columns_read, compile_check, compile_source
from toolkit.sql.spark import SPARK_STAGES, mark_reuse, spark_stage
from toolkit.sql.script import AFTER_VERDICT, created_table
from toolkit.sql.templates import Stage


def check_plan(check: Check) -> CompiledCheck:
    """Every statement a run executes for ``check``, on its engine."""
    compiled = compile_check(check)
    if check.source.engine.name != "spark":
        return compiled
    columns = columns_read([check])
    stages = tuple(spark_stage(check, s, columns) if s.name in SPARK_STAGES or _reads_sessions(s) else s
                   for s in compiled.stages)
    return replace(compiled, stages=mark_reuse(stages))


def _reads_sessions(stage: Stage) -> bool:
    """A stage after the verdict that reads the sessions again (the impact of a ratio or quantile
    measure): on Spark, where the sessions are."""
    session_table = AFTER_VERDICT.get(stage.name)
    return session_table is not None and any(created_table(s) == session_table for s in stage.once)


def source_plan(checks: list[Check]) -> Stage:
    """The source stage that reads one source's new files once for all of ``checks``, on their engine."""
    stage = compile_source(checks)
    if checks[0].source.engine.name != "spark":
        return stage
    return mark_reuse((spark_stage(checks[0], stage, columns_read(checks)),))[0]
