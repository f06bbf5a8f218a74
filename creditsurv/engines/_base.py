"""What an engine does: the one boundary between the stages and the data at scale.

An engine holds the configured inputs, registered under the internal names of
:mod:`creditsurv.data` (views ``panel``, ``panel_all``, ``loans``, ``macro``),
and runs the project's SQL text on them. The pipeline, the fit, the ECL and the
validation pack call these methods and never ask which engine they have.
DuckDB (:class:`~creditsurv.engines.DuckdbEngine`, one machine, the default)
and Spark (:class:`~creditsurv.engines.SparkEngine`) are peers.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, Protocol, runtime_checkable

import numpy as np
import pandas as pd
import pyarrow as pa

__all__ = ["DesignSums", "Engine", "SqlConnection"]


@runtime_checkable
class SqlConnection(Protocol):
    """The part of a SQL connection the feature spec reads: ``execute(sql, params)``.

    The returned cursor has ``fetchall()`` and ``description``. The SQL is the
    project's own text (DuckDB dialect); an engine renders it for its engine.
    """

    def execute(self, sql: str, params: Any = None) -> Any: ...


@runtime_checkable
class DesignSums(Protocol):
    """The fit's data, evaluated once: first-pass sums and the likelihood at any coefficients.

    Attributes
    ----------
    first : creditsurv.model.FirstPass
        Events by column, X'WX, the 0/1 columns and the row count, summed over all rows.
    fingerprint : str
        SHA-256 of the stored streams and the cell table (reproducible for the same data and engine settings).
    """

    first: Any
    fingerprint: str

    def evaluate(self, beta: np.ndarray, need_hess: bool) -> tuple[float, np.ndarray, np.ndarray | None]:
        """Log-likelihood, score (K, p) and observed information (K*p, K*p) at ``beta`` (K, p)."""
        ...

    def close(self) -> None: ...


@runtime_checkable
class Engine(Protocol):
    """The inputs of one run, opened by an engine. Close it (or use ``with``) when done.

    Attributes
    ----------
    name : str
        ``"duckdb"`` or ``"spark"``, for the record only.
    cfg : Config
        The run configuration.
    sources : dict of str to pathlib.Path
        Internal table name to input path.
    con : SqlConnection
        Runs the project's SQL text on the views.
    """

    name: str
    cfg: Any
    sources: dict[str, Path]
    con: SqlConnection

    def run_checks(self) -> pd.DataFrame:
        """Every data check: one row each with its severity, count and example rows."""
        ...

    def label_events(self) -> None:
        """Build ``loan_outcomes`` and ``loan_months`` from the event rules."""
        ...

    def event_counts(self) -> pd.DataFrame:
        """Loans by event and censor reason."""
        ...

    def book_at_as_of(self, segment_column: str | None = None) -> pd.DataFrame:
        """The loans on the book at the reporting month, one row each, sorted by loan id."""
        ...

    def macro_history(self) -> pd.DataFrame:
        """Macro history indexed by month index, one column per series."""
        ...

    def columns(self, table: str) -> list[str]:
        """Column names of the internal view ``table``."""
        ...

    def has_table(self, name: str) -> bool:
        """Whether the view or table ``name`` exists (``macro`` only when configured)."""
        ...

    def frame(self, sql: str, params: Mapping | Sequence | None = None) -> pd.DataFrame:
        """The result of the project's SQL text as a DataFrame (small results only)."""
        ...

    def batches(self, sql: str, params: Sequence | None, batch_size: int) -> Iterator[pa.RecordBatch]:
        """The result of ``sql`` as Arrow record batches of at most ``batch_size`` rows, in order."""
        ...

    def design_sums(
        self, spec: Any, sql: str, params: Sequence, *, collapse: bool, dropped: Sequence[int], codes: np.ndarray,
        kind: str, batch_size: int, temp_dir: Path | None, block_rows: int | None = None,
    ) -> DesignSums:
        """Evaluate the design of the raw rows of ``sql`` once and return its sums (see :class:`DesignSums`).

        The sums are those of :func:`creditsurv.model.block_sums` over the rows' cell form
        (:class:`creditsurv.model.CellDesign`); ``block_rows`` fixes the blocks an engine that cuts
        the rows itself adds in order (an engine whose partitions fix the order may ignore it).
        """
        ...

    def map_book(
        self, fn: Callable, book: pd.DataFrame, writers: Mapping[str, Callable], progress: Callable | None = None,
    ) -> list:
        """Run ``fn(part, writers, progress, workers)`` over partitions of the book; results in loan order.

        Each partition is a contiguous range of loan ids. Tables ``fn`` hands to
        ``writers`` reach the given writers in loan order, so the files do not
        depend on the partitioning. ``workers`` is how many threads or processes
        a partition may use (None: every core of this machine; 1 where the
        engine runs partitions side by side). With one partition the result
        list holds exactly what ``fn(book, writers, progress, None)`` returned.
        """
        ...

    def close(self) -> None: ...

    def __enter__(self) -> Engine: ...

    def __exit__(self, *exc) -> None: ...
