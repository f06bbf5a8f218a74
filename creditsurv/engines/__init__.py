"""Engines: what touches the data at scale, behind one declared interface (:class:`Engine`).

DuckDB (one machine, the default) and Spark (``engine: spark``) are peers:
:func:`open_engine` opens the configured inputs with the engine the config
names, and every stage calls the :class:`Engine` methods without asking which
engine it has.
"""

from ._base import DesignSums, Engine, SqlConnection
from ._duckdb import (
    DuckdbEngine,
    book_at_as_of,
    event_counts,
    label_events,
    on_connection,
    open_panel,
    run_checks,
)
from ._spark import SparkEngine, spark_session, spark_sql
from ._spark import open_panel as _open_spark

__all__ = [
    "DesignSums", "DuckdbEngine", "Engine", "SqlConnection", "book_at_as_of", "event_counts", "label_events",
    "on_connection", "open_engine", "open_panel", "run_checks", "SparkEngine", "spark_session", "spark_sql",
]  # fmt: skip


def open_engine(cfg) -> Engine:
    """Open the inputs of ``cfg`` with the engine it names (``engine: duckdb`` or ``spark``).

    Returns
    -------
    Engine
        Close it (or use ``with``) when done.
    """
    if cfg.engine == "spark":
        return _open_spark(cfg)
    return open_panel(cfg)
