"""The Spark engine: the same stages as the DuckDB engine, run on Apache Spark.

``engine: spark`` in the config sends the panel, the data checks, the event
labelling, the fit's likelihood passes and the projection with ECL to Spark.
The statistics are not written twice: the design (:meth:`FeatureSpec.design`),
the per-batch likelihood kernel by cell (:func:`creditsurv.model.block_sums`), the
Newton iterations, the checks on the design and the results object, the
projection and the ECL arithmetic are the same functions the DuckDB engine's
runs call. What is Spark's own:

- reading the inputs (Parquet or CSV) and the typed views ``panel``,
  ``panel_all``, ``loans`` and ``macro`` (Spark SQL, same names and types);
- rendering the DuckDB SQL of the checks, events and features for Spark SQL
  (:func:`spark_sql`): the same query text with a short, closed list of
  dialect rewrites; identifiers stay double-quoted, which Spark reads as
  identifiers with ``spark.sql.ansi.doubleQuotedIdentifiers``;
- where the sums of the fit are taken: per partition on the executors, then
  added on the driver in partition order, so the driver holds only
  parameter-sized arrays;
- splitting the book into loan partitions for projection and ECL (the loss
  stage combines the partitions' segment tables from their pooled sums).

:class:`SparkEngine` implements :class:`creditsurv.engines.Engine`; the
stages call only that interface. See docs/scaling.md.
"""

from __future__ import annotations

import functools
import glob
import hashlib
import io
import os
import re
import sys
import warnings
from contextlib import contextmanager
from pathlib import Path
from types import SimpleNamespace

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

from ..data import (
    LOAN_COLUMNS,
    LOAN_OUTCOMES_SQL,
    MACRO_COLUMNS,
    PANEL_COLUMNS,
    Source,
    book_sql,
    check_frame,
    event_params,
    file_format,
    input_sources,
    loan_months_sql,
    passthrough_columns,
    plan_checks,
    problem_text,
    resolve_inputs,
)
from ..errors import ConfigError, DataError, EngineError
from ..model import CellBlock, FirstPass, block_first_sums, block_sums, cell_design
from ..sql import month_index_sql, quote_ident, quote_literal

__all__ = [
    "SparkEngine",
    "book_at_as_of",
    "event_counts",
    "executor_python",
    "label_events",
    "macro_history",
    "open_panel",
    "run_checks",
    "spark_session",
    "spark_sql",
]

# Settings every creditsurv session needs: ANSI SQL with double-quoted identifiers
# (so the shared SQL text parses), month arithmetic in UTC.
_SQL_SETTINGS = {
    "spark.sql.ansi.enabled": "true",
    "spark.sql.ansi.doubleQuotedIdentifiers": "true",
    "spark.sql.session.timeZone": "UTC",
}


# --------------------------------------------------------------------------- the session


def executor_python(settings) -> str | None:
    """The Python the executors of a config's ``spark`` section start.

    PySpark takes the executors' interpreter from the ``PYSPARK_PYTHON``
    environment variable of the process that starts the session, which is the
    creditsurv process itself; the ``spark.pyspark.python`` setting is read
    only by ``spark-submit``. So creditsurv reads it here, in this order:

    1. ``spark.settings`` ``spark.pyspark.python`` (or
       ``spark.executorEnv.PYSPARK_PYTHON``; the config rejects two different ones);
    2. the ``PYSPARK_PYTHON`` environment variable;
    3. with a ``local`` master, this very interpreter (local workers are child
       processes of this machine and need creditsurv, numpy and duckdb);
    4. otherwise None: PySpark's default, ``python3`` on each worker host's PATH.

    Parameters
    ----------
    settings : config ``SparkSettings``

    Returns
    -------
    str or None
        A path (absolute, or relative to the executor's working folder, e.g.
        ``./environment/bin/python`` in an archive shipped with ``spark.archives``)
        or a command name.
    """
    conf = settings.settings
    chosen = conf.get("spark.pyspark.python") or conf.get("spark.executorEnv.PYSPARK_PYTHON")
    if chosen:
        return chosen
    if os.environ.get("PYSPARK_PYTHON"):
        return os.environ["PYSPARK_PYTHON"]
    return sys.executable if settings.master.startswith("local") else None


def spark_session(settings):
    """Get or create the SparkSession of a config's ``spark`` section.

    Parameters
    ----------
    settings : config ``SparkSettings``
        ``master``, ``app_name``, ``partitions`` (also the shuffle partitions)
        and extra ``settings`` (``spark.*`` keys). The executors start the
        Python :func:`executor_python` names.

    Returns
    -------
    (SparkSession, bool)
        The session, and whether this call created it (then the caller stops it).

    Raises
    ------
    ConfigError
        The session cannot start, or one is already running in this process
        with executors on another Python than the config names.
    """
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    python = executor_python(settings)
    named = settings.settings.get("spark.pyspark.python") or settings.settings.get("spark.executorEnv.PYSPARK_PYTHON")
    if active is not None and named and active.sparkContext.pythonExec != named:
        raise ConfigError(
            f"spark.settings.spark.pyspark.python: this process already runs a Spark session whose executors start "
            f"{active.sparkContext.pythonExec!r}, not {named!r}; stop that session first"
        )
    builder = SparkSession.builder.master(settings.master).appName(settings.app_name)
    conf = {
        "spark.ui.showConsoleProgress": "false",
        # A failed task's traceback is logged by the JVM at WARN on every attempt; creditsurv
        # raises its last line as one error instead (``_tasks``). The config may lower this.
        "spark.log.level": "ERROR",
        "spark.sql.shuffle.partitions": str(settings.partitions),
        **_SQL_SETTINGS,
        **dict(settings.settings),
    }
    for key, value in conf.items():
        builder = builder.config(key, str(value))
    before = os.environ.get("PYSPARK_PYTHON")
    try:
        if python:
            # Read once, when the SparkContext starts; restored below so that the
            # setting stays this session's.
            os.environ["PYSPARK_PYTHON"] = python
        spark = builder.getOrCreate()
    except Exception as exc:  # noqa: BLE001 - py4j and JVM start-up errors have no common base
        raise ConfigError(f"spark: cannot start a Spark session on {settings.master!r}: {_first_line(exc)}") from None
    finally:
        if before is None:
            os.environ.pop("PYSPARK_PYTHON", None)
        else:
            os.environ["PYSPARK_PYTHON"] = before
    for key, value in {**_SQL_SETTINGS, "spark.sql.shuffle.partitions": str(settings.partitions)}.items():
        spark.conf.set(key, value)
    return spark, active is None


@contextmanager
def _quiet_pandas_notice():
    """Silence PySpark's notice that it does not yet fully support pandas 3.

    PySpark repeats it on every Arrow conversion. creditsurv passes only Arrow
    tables and NumPy arrays across the Spark boundary (no pandas-on-Spark API),
    and the engine tests compare every result with the DuckDB engine, so the
    notice tells a user nothing they can act on. Nothing else is silenced.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
        yield


def _first_line(exc: Exception) -> str:
    text = str(exc).strip()
    for line in text.splitlines():
        line = line.strip()
        if line and not line.startswith(("An error occurred", "py4j", ": ")):
            return line
    return text.splitlines()[0] if text else type(exc).__name__


# --------------------------------------------------------------------------- one SQL text, two dialects

_REWRITES = (
    # DuckDB's $name parameters are Spark's :name parameter markers.
    (re.compile(r"\$([A-Za-z_]\w*)"), r":\1"),
    (re.compile(r"\barg_min\("), "min_by("),
    (re.compile(r"\barg_max\("), "max_by("),
    (re.compile(r" // "), " div "),
    (re.compile(r"\bAS VARCHAR\b(?!\s*\()"), "AS STRING"),
)
_DUCKDB_ONLY = ("list_contains", "list_position", "to_json(list", "EXCLUDE (", "::", "$")


def spark_sql(sql: str, codes=None) -> str:
    """Render creditsurv's DuckDB SQL text for Spark SQL.

    The rewrites are a closed list (parameters ``$x`` to ``:x``, ``arg_min``/
    ``arg_max`` to ``min_by``/``max_by``, ``//`` to ``div``, ``VARCHAR`` to
    ``STRING`` and the default status-code list); any DuckDB-only construct
    left over is an error rather than a silent difference.

    Parameters
    ----------
    sql : str
        DuckDB SQL as the checks, events and features write it.
    codes : sequence of str, optional
        Values of the ``$codes`` list parameter, inlined as quoted literals.
    """
    if "list_contains(CAST($codes AS VARCHAR[]), status)" in sql:
        items = ", ".join(quote_literal(c) for c in (codes or ()))
        sql = sql.replace(
            "list_contains(CAST($codes AS VARCHAR[]), status)", f"array_contains(CAST(array({items}) AS ARRAY<STRING>), status)"
        )
    for pattern, repl in _REWRITES:
        sql = pattern.sub(repl, sql)
    left = [t for t in _DUCKDB_ONLY if t in sql]
    if left:
        raise DataError(f"internal: no Spark rendering for {left} in:\n{sql}")  # pragma: no cover
    return sql


class _Cursor:
    """The part of a DuckDB cursor that the features code reads: ``description`` and ``fetchall``."""

    def __init__(self, frame):
        self._frame = frame
        self.description = [(name, None, None, None, None, None, None) for name in frame.columns]

    def fetchall(self) -> list[tuple]:
        return [tuple(row) for row in self._frame.collect()]


class SparkConnection:
    """A DuckDB-connection look-alike over a SparkSession, for the shared SQL builders.

    ``execute(sql, params)`` renders ``sql`` with :func:`spark_sql` and runs it
    with Spark's parameter markers (``?`` positional, ``:name`` named).
    """

    def __init__(self, spark):
        self.spark = spark

    def frame(self, sql: str, params=None):
        args = None
        if params:
            args = dict(params) if isinstance(params, dict) else list(params)
        return self.spark.sql(spark_sql(sql), args=args)

    def execute(self, sql: str, params=None) -> _Cursor:
        return _Cursor(self.frame(sql, params))


# --------------------------------------------------------------------------- the sources and views

_SPARK_NUMERIC = ("tinyint", "smallint", "int", "bigint", "float", "double", "decimal")
_SPARK_DATES = ("date", "timestamp", "timestamp_ntz")


def _is_numeric(spark_type: str) -> bool:
    return spark_type.split("(")[0] in _SPARK_NUMERIC


def _register(spark, name: str, key: str, source) -> Source:
    """Read ``source`` into the temp view ``_src_<name>`` and describe it."""
    path = Path(source.path)
    fmt = file_format(source)
    if fmt == "duckdb":
        raise DataError(
            f"{key}.path: the Spark engine reads Parquet or CSV files, not DuckDB database files; "
            f"export table {source.table!r} of {path} to Parquet, or use engine: duckdb"
        )
    has_glob = any(ch in str(path) for ch in "*?[")
    found = glob.glob(str(path)) if has_glob else ([str(path)] if path.is_file() or path.is_dir() else [])
    if not found and "://" not in str(source.path):
        what = "no file matches" if has_glob else "file not found"
        raise DataError(f"{key}.path: {what}: {path}")
    raw_view = f"_src_{name}"
    try:
        if fmt == "parquet":
            frame = spark.read.parquet(str(path))
        else:
            frame = spark.read.csv(str(path), header=True, inferSchema=True, enforceSchema=False)
            # DuckDB's sniffer reads whole numbers as BIGINT; keep the pass-through types alike.
            from pyspark.sql import functions as F

            frame = frame.select(
                *[
                    F.col(f"`{f.name}`").cast("bigint").alias(f.name) if f.dataType.simpleString() == "int" else F.col(f"`{f.name}`")
                    for f in frame.schema.fields
                ]
            )
        frame.createOrReplaceTempView(raw_view)
    except Exception as exc:  # noqa: BLE001 - Spark's analysis and IO errors
        raise DataError(f"{key}.path: cannot read {path} as {fmt}: {_first_line(exc)}") from None
    types = {f.name: f.dataType.simpleString() for f in frame.schema.fields}
    return Source(name, key, path, raw_view, types, {})


def _offending_value(spark, src, column: str, test: str) -> str | None:
    q = quote_ident
    rows = spark.sql(
        f"SELECT CAST(v AS STRING) FROM (SELECT {q(column)} AS v FROM {q(src.raw_view)}) "
        f"WHERE v IS NOT NULL AND ({test}) LIMIT 1"
    ).collect()
    return rows[0][0] if rows else None


def _numeric_expr(spark, src, column: str, problems: list[str], key: str) -> str:
    """Spark SQL for ``column`` as DOUBLE (NaN read as NULL), or record a type problem."""
    q = quote_ident(column)
    spark_type = src.types[column]
    if not _is_numeric(spark_type):
        if spark_type != "string":
            problems.append(f"{src.path}: column {column!r} ({key}) has type {spark_type.upper()}; expected numbers")
            return "NULL"
        bad = _offending_value(spark, src, column, "try_cast(trim(v) AS DOUBLE) IS NULL AND trim(v) <> ''")
        if bad is not None:
            problems.append(f"{src.path}: column {column!r} ({key}) holds text such as {bad!r}; expected numbers")
            return "NULL"
        q = f"try_cast(NULLIF(trim({q}), '') AS DOUBLE)"
    else:
        q = f"CAST({q} AS DOUBLE)"
    return f"CASE WHEN isnan({q}) THEN NULL ELSE {q} END"


def _month_expr(src, column: str, problems: list[str], key: str) -> str:
    """Spark SQL for ``column`` as the DATE of the first of its month (NULL if unreadable)."""
    q = quote_ident(column)
    spark_type = src.types[column]
    if spark_type in _SPARK_DATES:
        return f"trunc(CAST({q} AS DATE), 'MM')"
    if spark_type == "string":
        t = f"trim({q})"
        return (
            f"trunc(CASE WHEN {t} RLIKE '^[0-9]{{4}}-[0-9]{{2}}$' THEN try_to_date({t} || '-01', 'yyyy-MM-dd') "
            f"ELSE try_to_date({t}, 'yyyy-MM-dd') END, 'MM')"
        )
    problems.append(f"{src.path}: column {column!r} ({key}) has type {spark_type.upper()}; expected a date or YYYY-MM text")
    return "NULL"


def _month_idx(col: str) -> str:
    return f"CAST({month_index_sql(col)} AS INT)"


def _panel_view_sql(spark, src, cfg, problems) -> str:
    q = quote_ident
    m, key = src.mapping, f"{src.key}.columns"
    num = {c: _numeric_expr(spark, src, m[c], problems, f"{key}.{c}") for c in ("age", "balance", "days_past_due") if m.get(c)}
    month = _month_expr(src, m["month"], problems, f"{key}.month") if m.get("month") else "NULL"
    status = f"CAST({q(m['status'])} AS STRING)" if m.get("status") else "CAST(NULL AS STRING)"
    extra = "".join(f",\n       {c}" for c in passthrough_columns(src, PANEL_COLUMNS, problems))
    return f"""
WITH typed AS (
    SELECT CAST({q(m['loan_id'])} AS STRING) AS loan_id,
           {month} AS month,
           {num.get('age', 'NULL')} AS _age,
           CAST({num.get('balance', 'NULL')} AS DOUBLE) AS balance,
           {num.get('days_past_due', 'NULL')} AS _dpd,
           {status} AS status{extra}
    FROM {q(src.raw_view)}
)
SELECT loan_id,
       month,
       {_month_idx('month')} AS month_idx,
       try_cast(round(_age) AS INT) AS age,
       balance,
       try_cast(round(_dpd) AS INT) AS days_past_due,
       status{extra}
FROM typed"""


def _loans_view_sql(spark, src, cfg, problems) -> str:
    q = quote_ident
    m, key = src.mapping, f"{src.key}.columns"
    num = {
        c: _numeric_expr(spark, src, m[c], problems, f"{key}.{c}")
        for c in ("original_balance", "note_rate", "term", "property_value")
        if m.get(c)
    }
    orig = _month_expr(src, m["origination_month"], problems, f"{key}.origination_month")
    rate = num.get("note_rate", "NULL")
    if cfg.inputs.loans.rate_unit == "percent":
        rate = f"({rate}) / 100.0"
    extra = "".join(f",\n       {c}" for c in passthrough_columns(src, LOAN_COLUMNS, problems))
    return f"""
WITH typed AS (
    SELECT CAST({q(m['loan_id'])} AS STRING) AS loan_id,
           {orig} AS origination_month,
           CAST({num.get('original_balance', 'NULL')} AS DOUBLE) AS original_balance,
           CAST({rate} AS DOUBLE) AS note_rate,
           {num.get('term', 'NULL')} AS _term,
           CAST({num.get('property_value', 'NULL')} AS DOUBLE) AS property_value{extra}
    FROM {q(src.raw_view)}
)
SELECT loan_id,
       origination_month,
       {_month_idx('origination_month')} AS origination_idx,
       original_balance,
       note_rate,
       try_cast(round(_term) AS INT) AS term,
       property_value{extra}
FROM typed"""


def _macro_view_sql(spark, src, cfg, problems) -> str:
    q = quote_ident
    month_col = src.mapping["month"]
    month = _month_expr(src, month_col, problems, f"{src.key}.columns.month")
    series, names = [], []
    for column in src.types:
        if column == month_col:
            continue
        if column.lower() in MACRO_COLUMNS:
            problems.append(f"{src.path}: series column {column!r} has the name of an internal macro column; rename it")
            continue
        expr = _numeric_expr(spark, src, column, problems, f"series {column!r}")
        series.append(f"CAST({expr} AS DOUBLE) AS {q(column)}")
        names.append(q(column))
    extra = "".join(f",\n           {s}" for s in series)
    cols = "".join(f",\n       {c}" for c in names)
    return f"""
WITH typed AS (
    SELECT {month} AS month{extra}
    FROM {q(src.raw_view)}
)
SELECT month,
       {_month_idx('month')} AS month_idx{cols}
FROM typed"""


class SparkEngine:
    """The inputs as Spark temp views under internal names: the Spark engine.

    Implements :class:`creditsurv.engines.Engine`; open one with
    :func:`open_panel` (``engine: spark`` in the config).

    Attributes
    ----------
    spark : SparkSession
    con : SparkConnection
        Runs the shared (DuckDB-flavoured) SQL of the features stage on Spark.
    cfg : Config
    sources : dict of str to pathlib.Path
        Internal table name to input path.
    partitions : int
        Partitions of the loan-month and loan work (``spark.partitions``).
    """

    name = "spark"

    def __init__(self, cfg, spark, owns_session: bool):
        self.cfg = cfg
        self.spark = spark
        self.con = SparkConnection(spark)
        self.partitions = int(cfg.spark.partitions)
        self._owns_session = owns_session
        self._sources: dict = {}
        self._cached: list = []
        self._views: list[str] = []
        self.sources: dict = {}

    # The engine interface (see ``_base.Engine``): the stages call these.

    def run_checks(self) -> pd.DataFrame:
        return run_checks(self)

    def label_events(self) -> None:
        label_events(self)

    def event_counts(self) -> pd.DataFrame:
        return event_counts(self)

    def book_at_as_of(self, segment_column: str | None = None) -> pd.DataFrame:
        return book_at_as_of(self, segment_column)

    def macro_history(self) -> pd.DataFrame:
        return macro_history(self)

    def frame(self, sql: str, params=None) -> pd.DataFrame:
        try:
            table = _arrow(self.con.frame(sql, params))
        except Exception as exc:  # noqa: BLE001 - Spark's analysis and execution errors
            raise DataError(f"query failed: {_first_line(exc)}") from None
        return _as_duckdb_frame(table)

    def batches(self, sql: str, params, batch_size: int):
        """The rows of ``sql`` in order, as Arrow batches (collected to the driver first)."""
        try:
            table = _arrow(self.con.frame(sql, list(params) if params else None))
        except Exception as exc:  # noqa: BLE001
            raise DataError(f"query failed: {_first_line(exc)}") from None
        yield from table.to_batches(max_chunksize=batch_size)

    def design_sums(self, spec, sql, params, *, collapse, dropped, codes, kind, batch_size, temp_dir, block_rows=None):
        return _design_sums(self, spec, sql, params, collapse=collapse, dropped=dropped, codes=codes, kind=kind)

    def map_book(self, fn, book, writers, progress=None) -> list:
        return _map_book(self, fn, book, writers, progress)

    def view(self, name: str, frame, cache: bool = False):
        if cache:
            from pyspark import StorageLevel

            frame = frame.persist(StorageLevel.MEMORY_AND_DISK)
            self._cached.append(frame)
        frame.createOrReplaceTempView(name)
        self._views.append(name)
        return frame

    def has_table(self, name: str) -> bool:
        """Whether a view ``name`` exists (``macro`` only when configured)."""
        return name in self._views

    def columns(self, table: str) -> list[str]:
        """Column names of the internal view ``table``."""
        return list(self.spark.table(table).columns)

    def sql(self, sql: str, params=None):
        """Run creditsurv's DuckDB SQL text on Spark (see :func:`spark_sql`)."""
        return self.con.frame(sql, params)

    def close(self) -> None:
        """Release cached data and views; stop the session when this panel started it."""
        if self.spark is None:
            return
        for frame in self._cached:
            frame.unpersist()
        for name in dict.fromkeys(self._views + [s.raw_view for s in self._sources.values()]):
            self.spark.catalog.dropTempView(name)
        if self._owns_session:
            self.spark.stop()
        self._cached, self._views, self.spark = [], [], None

    def __enter__(self) -> "SparkEngine":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self.spark is None else "open"
        return f"<SparkEngine {state}: {', '.join(f'{k}={v}' for k, v in self.sources.items())}>"


def open_panel(cfg) -> SparkEngine:
    """Read the configured inputs into Spark and build the views ``panel``, ``panel_all``, ``loans``, ``macro``.

    Same contract and errors as :func:`creditsurv.engines.open_panel`; DuckDB
    database files are not readable here.
    """
    spark, owns = spark_session(cfg.spark)
    panel = SparkEngine(cfg, spark, owns)
    try:
        check_executors(spark.sparkContext)
        _build_views(panel)
    except BaseException:
        panel.close()
        raise
    return panel


def _executor_version(_rows):
    # runs on an executor: its own Python must have creditsurv installed
    from creditsurv.version import __version__

    yield __version__


def check_executors(sc) -> None:
    """Before any work: every executor slot starts a Python that imports creditsurv, of the driver's version.

    Fails in seconds, with the one-line message of :func:`_tasks`, instead of after the data checks and the
    events; a different creditsurv version on the workers would compute other numbers, so it is refused too.
    """
    from ..version import __version__

    slots = max(int(sc.defaultParallelism), 1)
    with _tasks(sc, "the executors' start-up check"):
        versions = set(sc.parallelize(range(slots), slots).mapPartitions(_executor_version).collect())
    if versions != {__version__}:
        raise EngineError(
            f"the Spark executors run creditsurv {', '.join(sorted(versions))} and the driver {__version__}: "
            "install the driver's version on every worker host, or ship it with spark.archives (README, Spark)"
        )


def _build_views(panel: SparkEngine) -> None:
    cfg, spark = panel.cfg, panel.spark
    inputs = input_sources(cfg)
    sources = {name: _register(spark, name, key, source) for name, key, source in inputs}
    panel._sources = sources
    resolve_inputs(cfg, inputs, sources)
    problems: list[str] = []
    builders = {"panel": _panel_view_sql, "loans": _loans_view_sql, "macro": _macro_view_sql}
    view_sql = {name: builders[name](spark, src, cfg, problems) for name, src in sources.items()}
    if problems:
        raise DataError(problem_text(problems))
    try:
        # Cached (memory, spilling to executor disk): every check, the events and
        # the fit read these views, and the typing work is done once.
        panel_all = panel.view("panel_all", spark.sql(view_sql["panel"]), cache=True)
        panel.view("panel", panel_all.where(f"month_idx <= {int(cfg.as_of)}"))
        panel.view("loans", spark.sql(view_sql["loans"]), cache=True)
        if "macro" in view_sql:
            panel.view("macro", spark.sql(view_sql["macro"]), cache=True)
    except Exception as exc:  # noqa: BLE001 - pragma: no cover, the checks above should prevent it
        raise DataError(f"cannot build the internal views: {_first_line(exc)}") from None
    panel.sources = {name: s.path for name, s in sources.items()}


# --------------------------------------------------------------------------- checks and events


def _arrow(frame) -> pa.Table:
    """A Spark DataFrame as an Arrow table (types kept: int32, date32, string, double)."""
    with _quiet_pandas_notice():
        return frame.toArrow()


def _as_duckdb_frame(table: pa.Table, sql: str = "SELECT * FROM t") -> pd.DataFrame:
    """Turn Arrow into pandas the way DuckDB's ``.df()`` does, so both engines give the same dtypes."""
    with duckdb.connect() as con:
        con.register("t", table)
        return con.execute(sql).df()


def _examples(table: pa.Table, order: str) -> str:
    """JSON text of the example rows, formatted by DuckDB exactly as the DuckDB engine does."""
    with duckdb.connect() as con:
        con.register("offending_rows", table)
        return con.execute(
            f"SELECT CAST(coalesce(to_json(list(e)), '[]') AS VARCHAR) "
            f"FROM (SELECT * FROM offending_rows ORDER BY {order}) AS e"
        ).fetchall()[0][0]


def run_checks(panel: SparkEngine) -> pd.DataFrame:
    """Run every data check on Spark; the same table as :func:`creditsurv.engines.run_checks`."""
    from pyspark.sql import functions as F

    plans = plan_checks(panel.cfg, panel._sources)
    results = []
    for pl in plans:
        count, examples = 0, "[]"
        if pl.severity != "off":
            try:
                offending = panel.sql(f"WITH {pl.sql}\nSELECT * FROM offending", pl.params)
                count = offending.count()
                if count:
                    top = offending.orderBy(*[F.col(f"`{c}`").asc_nulls_last() for c in offending.columns]).limit(5)
                    examples = _examples(_arrow(top), pl.order)
            except DataError:
                raise
            except Exception as exc:  # noqa: BLE001 - Spark's analysis and execution errors
                raise DataError(f"data check {pl.check.name} on {pl.source} failed: {_first_line(exc)}") from None
        results.append((count, examples))
    return check_frame(plans, results)


def _strip_create(sql: str) -> tuple[str, str]:
    match = re.match(r"\s*CREATE OR REPLACE TABLE (\w+) AS\s*", sql)
    return match.group(1), sql[match.end():]


def label_events(panel: SparkEngine) -> None:
    """The views ``loan_outcomes`` and ``loan_months`` (cached), from the events stage's SQL."""
    cfg = panel.cfg
    for text in (LOAN_OUTCOMES_SQL, loan_months_sql(len(cfg.arrears.starts))):
        name, body = _strip_create(text)
        if name == "loan_months":
            # The fit sorts its own read; a global sort here would be a wasted shuffle.
            body = re.sub(r"\nORDER BY loan_id, month_idx\s*$", "\n", body)
        # the status codes are inlined by spark_sql
        params = {k: v for k, v in event_params(cfg, body).items() if k != "codes"}
        try:
            frame = panel.spark.sql(spark_sql(body, codes=cfg.default_definition.status_codes), args=params or None)
            panel.view(name, frame, cache=True)
        except Exception as exc:  # noqa: BLE001
            raise DataError(f"event labelling failed on {panel.sources.get('panel')}: {_first_line(exc)}") from None


def event_counts(panel: SparkEngine) -> pd.DataFrame:
    """Loans by event and censor reason; the same table as :func:`creditsurv.engines.event_counts`."""
    if not panel.has_table("loan_outcomes"):
        label_events(panel)
    counts = _arrow(panel.spark.sql("SELECT event, censor_reason, count(*) AS loans FROM loan_outcomes GROUP BY event, censor_reason"))
    frame = _as_duckdb_frame(
        counts,
        """
        SELECT event, censor_reason, loans, loans / sum(loans) OVER () AS share
        FROM t
        ORDER BY list_position(['default', 'prepay', 'maturity', 'censored'], event),
                 censor_reason NULLS FIRST
        """,
    )
    reason = frame["censor_reason"].astype(object)
    frame["censor_reason"] = reason.where(reason.notna(), None)
    return frame.astype({"loans": "int64", "share": "float64"})


def book_at_as_of(panel: SparkEngine, segment_column: str | None = None) -> pd.DataFrame:
    """The book at the reporting month; same rows, columns and dtypes as :func:`creditsurv.engines.book_at_as_of`.

    One row per loan on the book passes through the driver (the panel does not).
    """
    if not panel.has_table("loan_outcomes"):
        label_events(panel)

    segment = f"CAST(l.{quote_ident(segment_column)} AS VARCHAR)" if segment_column else "'all'"
    cfg = panel.cfg
    text = book_sql(segment, len(cfg.arrears.starts))
    sql = spark_sql(text)
    params = event_params(cfg, text)
    try:
        table = _arrow(panel.spark.sql(sql, args=params))
    except Exception as exc:  # noqa: BLE001
        raise DataError(f"cannot build the book at {cfg.as_of}: {_first_line(exc)}") from None
    return _as_duckdb_frame(table, "SELECT * FROM t ORDER BY loan_id")


def macro_history(panel: SparkEngine) -> pd.DataFrame:
    """Macro history indexed by month index, every series a column (as ``pipeline._macro_history``)."""
    table = _arrow(panel.spark.sql("SELECT * FROM macro"))
    frame = _as_duckdb_frame(table, "SELECT * EXCLUDE (month) FROM t ORDER BY month_idx")
    return frame.set_index("month_idx")


# --------------------------------------------------------------------------- the fit


def _design_blocks(design, collapse, dropped, batches):
    """Executor side, once: the cell form of each Arrow batch of raw rows (see :class:`CellDesign`)."""
    for batch in batches:
        raw = {nm: batch.column(i).to_numpy(zero_copy_only=False) for i, nm in enumerate(batch.schema.names)}
        block = design.block(raw, collapse, dropped)
        if block is None:
            continue
        w = b"" if block.w is None else block.w.tobytes()
        yield pa.RecordBatch.from_pydict(
            {"c": [block.c.tobytes()], "y": [block.y.tobytes()], "w": [w], "Z": [np.ascontiguousarray(block.Z).tobytes()]},
            schema=pa.schema([("c", pa.binary()), ("y", pa.binary()), ("w", pa.binary()), ("Z", pa.binary())]),
        )


def _decode_block(row):
    c = np.frombuffer(row["c"], dtype=np.uint16)
    w = np.frombuffer(row["w"], dtype=np.float64) if row["w"] else None
    return CellBlock(c, np.frombuffer(row["y"], dtype=np.int8), w, np.frombuffer(row["Z"], dtype=np.float64).reshape(-1, c.shape[0]))


def _first_pass_partition(design, index, blocks):
    total = None
    for block in blocks:
        sums = block_first_sums(design, block)
        if total is None:
            total = sums
        else:
            total += sums
    if total is not None:
        yield index, total.counts, total.S_rows, total.x_cross, total.x_rows, total.is01_rows, total.n, total.digests


def _sums_partition(design, beta_bc, codes, kind, need_hess, index, blocks):
    """Executor side, per Newton evaluation: this partition's sums by cell (:class:`PassSums`), blocks added in order."""
    beta = beta_bc.value
    eta_cell = design.prepare(beta)
    total = None
    for block in blocks:
        part = block_sums(design, block, eta_cell, beta, codes, kind, need_hess)
        if total is None:
            total = part
        else:
            total += part
    if total is not None:
        yield index, total


class _CachedSums:
    """The Spark engine's :class:`~creditsurv.engines.DesignSums`.

    The rows' cell form is computed once per partition and cached on the executors;
    each Newton evaluation runs one Spark job whose tasks return the partition's
    sums by cell (:func:`creditsurv.model.block_sums`, the DuckDB engine's kernel),
    added on the driver in partition order, so the driver holds only arrays of the
    size of the cell table and the parameters.

    ``fingerprint`` hashes the partitions' stream digests in order; it is
    reproducible for the same data, spec and partitioning but is not the
    DuckDB engine's fingerprint.
    """

    def __init__(self, engine, blocks, design, first, fingerprint: str, codes, kind: str):
        self.first, self.fingerprint = first, fingerprint
        self._blocks, self._design, self._codes, self._kind = blocks, design, codes, kind
        self._sc = engine.spark.sparkContext

    def evaluate(self, beta, need_hess):
        bc = self._sc.broadcast(np.asarray(beta, dtype=np.float64))
        try:
            fn = functools.partial(_sums_partition, self._design, bc, self._codes, self._kind, need_hess)
            results = sorted(_collect(self._blocks.mapPartitionsWithIndex(fn), "the fit's Newton iterations"), key=lambda r: r[0])
        finally:
            bc.destroy()
        total = None
        for _i, part in results:
            if total is None:
                total = part
            else:
                total += part
        return self._design.finish(total, beta.shape[0], need_hess)

    def close(self) -> None:
        self._blocks.unpersist()


def _design_sums(engine, spec, sql, params, *, collapse, dropped, codes, kind):
    """Compute the rows' cell form per partition on the executors (cached) and take the first pass.

    Spark's Arrow batches (``spark.sql.execution.arrow.maxRecordsPerBatch``)
    bound a task's memory; the fit's ``batch_size`` and ``block_rows`` are not used.
    """
    from pyspark import StorageLevel

    design = cell_design(spec)
    try:
        raw = engine.con.frame(sql, list(params) if params else None)
        if not collapse:
            # Whole loans per partition, rows in (loan, month) order within each.
            raw = raw.repartitionByRange(engine.partitions, "loan_id").sortWithinPartitions("loan_id", "month_idx")
        schema = "c binary, y binary, w binary, Z binary"
        with _quiet_pandas_notice():
            blocks = (
                raw.mapInArrow(functools.partial(_design_blocks, design, collapse, dropped), schema)
                .rdd.map(_decode_block)
                .persist(StorageLevel.MEMORY_AND_DISK)
            )
    except Exception as exc:  # noqa: BLE001
        raise DataError(f"cannot read the risk set for the fit: {_first_line(exc)}") from None
    try:
        first_pass = blocks.mapPartitionsWithIndex(functools.partial(_first_pass_partition, design))
        parts = sorted(_collect(first_pass, "the fit's first pass"), key=lambda r: r[0])
    except BaseException:
        blocks.unpersist()
        raise
    if not parts:
        first = FirstPass(design.p)
        return _CachedSums(engine, blocks, design, first, first.fingerprint(design.names), codes, kind)
    _i, counts, S_rows, x_cross, x_rows, is01_rows, n, _d = parts[0]
    sums = SimpleNamespace(counts=counts, S_rows=S_rows, x_cross=x_cross, x_rows=x_rows, is01_rows=is01_rows, n=n)
    for _i, counts, S_rows, x_cross, x_rows, is01_rows, n, _d in parts[1:]:
        sums.counts += counts
        sums.S_rows += S_rows
        sums.x_cross += x_cross
        sums.x_rows += x_rows
        sums.is01_rows &= is01_rows
        sums.n += n
    sums.digests = [hashlib.sha256("|".join(part[7][k] for part in parts).encode()).hexdigest() for k in range(len(parts[0][7]))]
    first = design.first_pass(sums)
    return _CachedSums(engine, blocks, design, first, first.fingerprint(design.names, design.digest()), codes, kind)


def _collect(rdd, step: str):
    """``rdd.collect()``, its task failures raised as one-line creditsurv errors (see :func:`_tasks`)."""
    with _tasks(rdd.context, step):
        return rdd.collect()


@contextmanager
def _tasks(sc, step: str):
    """Run Spark jobs whose tasks run creditsurv's Python; a failure becomes one line naming ``step``.

    creditsurv's own errors raised in a task are raised as themselves; any other
    task failure (a Python exception, an executor that cannot start its Python)
    becomes an :class:`EngineError` with the root cause's last line.
    """
    from ..errors import CreditsurvError

    try:
        yield
    except Exception as exc:  # noqa: BLE001 - py4j, PySpark and JVM errors have no common base
        text = str(exc)
        for cls in _error_classes(CreditsurvError):
            marker = f"{cls.__module__}.{cls.__name__}: "
            if marker in text:
                message = text.split(marker, 1)[1].split("\n\n")[0].split("\n\tat ")[0].strip()
                raise cls(message) from None
        cause = _root_cause(exc)
        message = f"Spark tasks failed in {step}: {cause}"
        if re.search(r"ModuleNotFoundError|ImportError|Cannot run program|No such file", cause):
            message += (
                f"; the executors started {sc.pythonExec!r}, which must be a Python with creditsurv installed: "
                "set spark.settings.spark.pyspark.python to one on every worker host, or ship a packed "
                "environment with spark.archives (README, Spark)"
            )
        raise EngineError(message) from None


def _root_cause(exc: Exception) -> str:
    """The last line of the innermost error in a Spark failure: the Python exception, else the last Java cause."""
    lines = str(exc).splitlines()
    starts = [i for i, line in enumerate(lines) if line.strip().startswith("Traceback (most recent call last)")]
    if starts:
        for line in lines[starts[-1] + 1:]:
            if line.strip() and not line[0].isspace():
                return line.strip()
    causes = [line.strip()[len("Caused by: "):] for line in lines if line.strip().startswith("Caused by: ")]
    return causes[-1] if causes else _first_line(exc)


def _error_classes(root):
    out = [root]
    for sub in root.__subclasses__():
        out = _error_classes(sub) + out
    return out


# --------------------------------------------------------------------------- projection and ECL per partition of loans


def _ipc(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema, options=pa.ipc.IpcWriteOptions(compression="zstd")) as writer:
        writer.write_table(table)
    return sink.getvalue()


def _from_ipc(data: bytes) -> pa.Table:
    return pa.ipc.open_stream(data).read_all()


def _run_partition(fn, wanted, index, slices):
    """Executor side: ``fn`` on one partition's loans, on one core (Spark runs the partitions side by side); the long
    tables it writes kept as Arrow IPC bytes."""
    for part in slices:
        tables = {name: [] for name in wanted}
        writers = {name: (lambda t, out=tables[name]: out.append(_ipc(t))) for name in wanted}
        yield {"index": index, "n": len(part), "result": fn(part, writers, None, 1), "tables": tables}


def _whole_partition(items):
    """A partition's items as one list (``SparkContext.runJob``'s partition function)."""
    return list(items)


def _split_book(book: pd.DataFrame, partitions: int) -> list[pd.DataFrame]:
    """Contiguous ranges of loans in loan-id order, about equal in size, none empty."""
    frame = book.sort_values("loan_id", kind="stable").reset_index(drop=True)
    k = max(1, min(int(partitions), len(frame)))
    bounds = np.linspace(0, len(frame), k + 1).round().astype(int)
    return [frame.iloc[a:b] for a, b in zip(bounds, bounds[1:]) if b > a]


def _map_book(engine, fn, book, writers, progress=None) -> list:
    """Run ``fn`` per contiguous range of loans on the executors; replay the long tables in loan order.

    The long tables pass through the driver one partition at a time, in loan
    order, so the files are the same as the DuckDB engine's. ``progress`` is
    called after each partition with the loans done so far.
    """
    from pyspark import StorageLevel

    if len(book) == 0:
        return [fn(book, writers, progress, 1)]
    sc = engine.spark.sparkContext
    slices = _split_book(book, engine.partitions)
    wanted = tuple(writers)
    task = functools.partial(_run_partition, fn, wanted)
    rdd = sc.parallelize(slices, len(slices)).mapPartitionsWithIndex(task).persist(StorageLevel.MEMORY_AND_DISK)
    results = []
    try:
        step = "the projection and ECL of the book"
        _collect(rdd.map(lambda b: b["n"]), step)  # every partition in parallel; results stay cached on the executors
        done, total = 0, len(book)
        with _tasks(sc, step):
            # One job per cached partition, in order: the driver holds one partition's tables at a time. (The
            # socket iterator of toLocalIterator was seen to hang when the executors were busy.)
            bundles = (b for i in range(rdd.getNumPartitions()) for b in sc.runJob(rdd, _whole_partition, [i]))
            for bundle in bundles:
                for name in wanted:
                    for data in bundle["tables"][name]:
                        writers[name](_from_ipc(data))
                results.append(bundle["result"])
                done += bundle["n"]
                if progress is not None:
                    progress(done, total)
    finally:
        rdd.unpersist()
    return results
