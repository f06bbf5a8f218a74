"""Engines: what touches the data at scale. DuckDB (one machine, the default) and Spark are peers."""

from ._duckdb import (
    Panel,
    book_at_as_of,
    event_counts,
    label_events,
    open_panel,
    run_checks,
)

__all__ = ["Panel", "book_at_as_of", "event_counts", "label_events", "open_panel", "run_checks"]
