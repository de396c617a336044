"""Plimsoll: checks over a playback-session lake, compiled to DuckDB SQL.

The packages follow the data, each using only those listed before it:
``model`` and ``problems`` (the typed project, errors with places) -> ``sql`` (templates of
``queries/`` rendered into each check's plan) -> ``lake`` (the source's files) -> ``config`` (YAML
loaded and validated into a model) -> ``engine`` (runs: the warehouse, the runner, Spark) ->
``outputs`` (listings, report, delivery) -> ``backtest`` -> ``demo`` -> ``cli``.
"""

from pathlib import Path

__version__ = "0.1.0"

# Installed, the templates, the catalogue and the demo generator are subpackages of this one
# (``toolkit.queries``, ``toolkit.checks``, ``toolkit.warehouse_demo``). In a checkout they sit beside
# this folder; when the checkout itself is imported (``python -m pytest`` at its root), look there.
_CHECKOUT = Path(__file__).resolve().parent.parent
if not (Path(__file__).parent / "queries").is_dir() and (_CHECKOUT / "queries" / "__init__.py").is_file():
    __path__.append(str(_CHECKOUT))  # noqa: F821 (a package's own __path__)
