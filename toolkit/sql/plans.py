"""A check's plan for the engine it runs on: DuckDB's compiled stages, turned into Spark's where the
project's engine is Spark (:mod:`toolkit.sql.spark`). The runner and ``plimsoll sql`` take their
plans from here; the definition hash stays DuckDB's, so switching engines keeps a check's state.
"""

from __future__ import annotations

from dataclasses import replace

from toolkit.model import Check
from toolkit.sql.compiler import CompiledCheck, columns_read, compile_check, compile_source
from toolkit.sql.spark import SPARK_STAGES, mark_reuse, spark_stage
from toolkit.sql.templates import Stage


def check_plan(check: Check) -> CompiledCheck:
    """Every statement a run executes for ``check``, on its engine."""
    compiled = compile_check(check)
    if check.source.engine.name != "spark":
        return compiled
    columns = columns_read([check])
    stages = tuple(spark_stage(check, s, columns) if s.name in SPARK_STAGES else s for s in compiled.stages)
    return replace(compiled, stages=mark_reuse(stages))


def source_plan(checks: list[Check]) -> Stage:
    """The source stage that reads one source's new files once for all of ``checks``, on their engine."""
    stage = compile_source(checks)
    if checks[0].source.engine.name != "spark":
        return stage
    return mark_reuse((spark_stage(checks[0], stage, columns_read(checks)),))[0]
