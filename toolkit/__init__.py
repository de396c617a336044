"""Plimsoll: checks over a playback-session lake, compiled to DuckDB SQL.

The stages data passes through, one module each:
``project`` (load and validate YAML) -> ``model`` (typed checks) -> ``compiler`` (Jinja2 templates in
``queries/`` to SQL) -> ``runner`` (executes the compiled SQL in one transaction) -> ``warehouse``
(tables) -> ``outputs`` (alert listings) and ``demo``.
"""

__version__ = "0.1.0"
