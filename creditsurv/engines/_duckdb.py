"""The loan-month panel in DuckDB, and the data checks run on it.

``open_panel(cfg)`` opens one in-memory DuckDB connection, registers the input
files read-only and exposes them under our internal column names as views:

``panel``      one row per loan and month up to ``cfg.as_of``: ``loan_id`` VARCHAR,
               ``month`` DATE (first of month), ``month_idx`` INTEGER, ``age`` INTEGER,
               ``balance`` DOUBLE, ``days_past_due`` INTEGER, ``status`` VARCHAR,
               then every other source column unchanged
``panel_all``  the same with every row, also those after ``cfg.as_of``
``loans``      ``loan_id`` VARCHAR, ``origination_month`` DATE, ``origination_idx``
               INTEGER, ``original_balance`` DOUBLE, ``note_rate`` DOUBLE (decimal
               fraction per year), ``term`` INTEGER, ``property_value`` DOUBLE, then
               every other source column unchanged
``macro``      ``month`` DATE, ``month_idx`` INTEGER, every series as DOUBLE
               (only when ``inputs.macro`` is configured)

``run_checks(panel)`` runs every data check as one SQL query each and returns one
row per check; ``raise_for_errors`` turns failed checks into a ``DataCheckError``
and warnings into ``DataCheckWarning``.

Column names read from the config are only ever used as quoted identifiers
(:func:`quote_ident`) after they were found among the source's columns; values
reach DuckDB as parameters.
"""

from __future__ import annotations

import dataclasses
import glob
import os
import shutil
import socket
import tempfile
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..config import Config
from ..data import (
    LOAN_COLUMNS,
    LOAN_OUTCOMES_SQL,
    MACRO_COLUMNS,
    PANEL_COLUMNS,
    Check,
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
from ..errors import ConfigError, DataError, did_you_mean
from ..model import (
    FIT_BLOCK_ROWS,
    FIT_GROUP_BLOCKS,
    CellBlock,
    FirstPass,
    ProcessPool,
    block_first_sums,
    block_sums,
    cell_design,
    ordered_map,
    worth_forking,
)
from ..processes import process_running
from ..sql import month_index_sql, quote_ident

__all__ = [
    "DuckdbEngine",
    "book_at_as_of",
    "event_counts",
    "label_events",
    "on_connection",
    "open_panel",
    "run_checks",
]

Severity = str  # "error" | "warning" | "off"


# --------------------------------------------------------------------------- the sources

_NUMERIC_TYPES = (
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT",
    "UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT", "UHUGEINT",
    "FLOAT", "DOUBLE", "DECIMAL",
)
_DATE_TYPES = ("DATE", "TIMESTAMP")
_TEXT_TYPES = ("VARCHAR",)


def _is_numeric(duck_type: str) -> bool:
    return duck_type.upper().startswith(_NUMERIC_TYPES)


def _register(con, name: str, key: str, source) -> Source:
    """Create the raw view ``_src_<name>`` over ``source`` and describe it."""
    path = Path(source.path)
    fmt = file_format(source)
    has_glob = any(ch in str(path) for ch in "*?[")
    found = glob.glob(str(path)) if has_glob else ([str(path)] if path.is_file() else [])
    if not found:
        what = "no file matches" if has_glob else "file not found"
        raise DataError(f"{key}.path: {what}: {path}")
    raw_view = f"_src_{name}"
    try:
        if fmt == "parquet":
            con.read_parquet(str(path)).create_view(raw_view)
        elif fmt == "csv":
            # The sniffer reads the whole file once, so a late non-numeric value
            # is seen; the view then keeps the detected column types.
            con.read_csv(str(path), header=True, sample_size=-1).create_view(raw_view)
        else:
            alias = f"_db_{name}"
            con.execute(f"ATTACH $path AS {quote_ident(alias)} (READ_ONLY)", {"path": str(path)})
            tables = [
                r[0]
                for r in con.execute(
                    "SELECT table_name FROM duckdb_tables() WHERE database_name = $db "
                    "UNION ALL SELECT view_name FROM duckdb_views() WHERE database_name = $db "
                    "ORDER BY 1",
                    {"db": alias},
                ).fetchall()
            ]
            if source.table not in tables:
                raise DataError(
                    f"{key}.table: no table {source.table!r} in {path} "
                    f"(tables: {', '.join(tables) or 'none'}){did_you_mean(source.table, tables)}"
                )
            con.execute(
                f"CREATE VIEW {quote_ident(raw_view)} AS "
                f"SELECT * FROM {quote_ident(alias)}.{quote_ident(source.table)}"
            )
        described = con.execute(f"DESCRIBE {quote_ident(raw_view)}").fetchall()
    except duckdb.Error as exc:
        raise DataError(f"{key}.path: cannot read {path} as {fmt}: {_duck_message(exc)}") from None
    types = {row[0]: str(row[1]) for row in described}
    return Source(name, key, path, raw_view, types, {})


def _duck_message(exc: Exception) -> str:
    """DuckDB's first line, and for a CSV error its cause (``... This file is not utf-8 encoded.``), on one line."""
    lines = [line.strip() for line in str(exc).strip().splitlines()]
    if not lines:
        return type(exc).__name__
    if "CSV Error" in lines[0]:
        cause = next((x for x in lines[1:] if x and not x.startswith(("Original Line", "Possible Solution", "file ="))), None)
        if cause:
            return f"{lines[0]}: {cause}"
    return lines[0]


def _offending_value(con, src: Source, column: str, test: str) -> str | None:
    """First value (in file order) of ``column`` for which SQL predicate ``test`` holds."""
    row = con.execute(
        f"SELECT CAST(v AS VARCHAR) FROM (SELECT {quote_ident(column)} AS v FROM {quote_ident(src.raw_view)}) "
        f"WHERE v IS NOT NULL AND ({test}) LIMIT 1"
    ).fetchall()
    return row[0][0] if row else None


def _numeric_expr(con, src: Source, internal: str, column: str, problems: list[str], key: str) -> str:
    """SQL for ``column`` as DOUBLE (NaN read as NULL), or record a type problem."""
    q = quote_ident(column)
    duck_type = src.types[column]
    if not _is_numeric(duck_type):
        if duck_type.upper() not in _TEXT_TYPES:
            problems.append(f"{src.path}: column {column!r} ({key}) has type {duck_type}; expected numbers")
            return "NULL"
        # A text column may be all empty (read as text) or hold numbers as text.
        bad = _offending_value(con, src, column, "TRY_CAST(trim(v) AS DOUBLE) IS NULL AND trim(v) <> ''")
        if bad is not None:
            problems.append(
                f"{src.path}: column {column!r} ({key}) holds text such as {bad!r}; expected numbers"
            )
            return "NULL"
        q = f"TRY_CAST(NULLIF(trim({q}), '') AS DOUBLE)"
    else:
        q = f"CAST({q} AS DOUBLE)"
    return f"CASE WHEN isnan({q}) THEN NULL ELSE {q} END"


def _month_expr(src: Source, column: str, problems: list[str], key: str) -> str:
    """SQL for ``column`` as the DATE of the first of its month (NULL if unreadable)."""
    q = quote_ident(column)
    duck_type = src.types[column].upper()
    if duck_type.startswith(_DATE_TYPES):
        return f"CAST(date_trunc('month', CAST({q} AS DATE)) AS DATE)"
    if duck_type in _TEXT_TYPES:
        t = f"trim({q})"
        return (
            f"CAST(date_trunc('month', CASE WHEN regexp_full_match({t}, '\\d{{4}}-\\d{{2}}') "
            f"THEN try_strptime({t} || '-01', '%Y-%m-%d') "
            f"ELSE try_strptime({t}, '%Y-%m-%d') END) AS DATE)"
        )
    problems.append(
        f"{src.path}: column {column!r} ({key}) has type {src.types[column]}; "
        "expected a date or YYYY-MM text"
    )
    return "NULL"


# --------------------------------------------------------------------------- the views

def _panel_view_sql(con, src: Source, cfg: Config, problems: list[str]) -> str:
    m, key = src.mapping, f"{src.key}.columns"
    num = {
        c: _numeric_expr(con, src, c, m[c], problems, f"{key}.{c}")
        for c in ("age", "balance", "days_past_due")
        if m.get(c)
    }
    month = _month_expr(src, m["month"], problems, f"{key}.month") if m.get("month") else "NULL"
    status = f"CAST({quote_ident(m['status'])} AS VARCHAR)" if m.get("status") else "CAST(NULL AS VARCHAR)"
    rest = passthrough_columns(src, PANEL_COLUMNS, problems)
    extra = "".join(f",\n       {c}" for c in rest)
    return f"""
WITH typed AS (
    SELECT CAST({quote_ident(m['loan_id'])} AS VARCHAR) AS loan_id,
           {month} AS month,
           {num.get('age', 'NULL')} AS _age,
           {num.get('balance', 'NULL')} AS balance,
           {num.get('days_past_due', 'NULL')} AS _dpd,
           {status} AS status{extra}
    FROM {quote_ident(src.raw_view)}
)
SELECT loan_id,
       month,
       CAST({month_index_sql('month')} AS INTEGER) AS month_idx,
       TRY_CAST(round(_age) AS INTEGER) AS age,
       balance,
       TRY_CAST(round(_dpd) AS INTEGER) AS days_past_due,
       status{extra}
FROM typed"""


def _loans_view_sql(con, src: Source, cfg: Config, problems: list[str]) -> str:
    m, key = src.mapping, f"{src.key}.columns"
    num = {
        c: _numeric_expr(con, src, c, m[c], problems, f"{key}.{c}")
        for c in ("original_balance", "note_rate", "term", "property_value")
        if m.get(c)
    }
    orig = _month_expr(src, m["origination_month"], problems, f"{key}.origination_month")
    rate = num.get("note_rate", "NULL")
    if cfg.inputs.loans.rate_unit == "percent":
        rate = f"({rate}) / 100.0"
    rest = passthrough_columns(src, LOAN_COLUMNS, problems)
    extra = "".join(f",\n       {c}" for c in rest)
    return f"""
WITH typed AS (
    SELECT CAST({quote_ident(m['loan_id'])} AS VARCHAR) AS loan_id,
           {orig} AS origination_month,
           {num.get('original_balance', 'NULL')} AS original_balance,
           {rate} AS note_rate,
           {num.get('term', 'NULL')} AS _term,
           CAST({num.get('property_value', 'NULL')} AS DOUBLE) AS property_value{extra}
    FROM {quote_ident(src.raw_view)}
)
SELECT loan_id,
       origination_month,
       CAST({month_index_sql('origination_month')} AS INTEGER) AS origination_idx,
       original_balance,
       note_rate,
       TRY_CAST(round(_term) AS INTEGER) AS term,
       property_value{extra}
FROM typed"""


def _macro_view_sql(con, src: Source, cfg: Config, problems: list[str]) -> str:
    month_col = src.mapping["month"]
    month = _month_expr(src, month_col, problems, f"{src.key}.columns.month")
    series = []
    for column in src.types:
        if column == month_col:
            continue
        if column.lower() in MACRO_COLUMNS:
            problems.append(
                f"{src.path}: series column {column!r} has the name of an internal macro column; rename it"
            )
            continue
        expr = _numeric_expr(con, src, column, column, problems, f"series {column!r}")
        series.append(f"{expr} AS {quote_ident(column)}")
    extra = "".join(f",\n           {s}" for s in series)
    names = "".join(f",\n       {quote_ident(c)}" for c in src.types if c != month_col and c.lower() not in MACRO_COLUMNS)
    return f"""
WITH typed AS (
    SELECT {month} AS month{extra}
    FROM {quote_ident(src.raw_view)}
)
SELECT month,
       CAST({month_index_sql('month')} AS INTEGER) AS month_idx{names}
FROM typed"""


class DuckdbEngine:
    """The inputs registered in one DuckDB connection, under internal names.

    Use :func:`open_panel` to build one. Close it (or use ``with``) to release
    the connection and its spill folder.

    Attributes
    ----------
    con : duckdb.DuckDBPyConnection
        The connection holding the views ``panel``, ``panel_all``, ``loans`` and
        (when configured) ``macro``.
    cfg : Config
        The run configuration.
    sources : dict of str to pathlib.Path
        Internal table name to input path.
    """

    name = "duckdb"

    def __init__(self, cfg: Config, con, sources: dict[str, Source], spill_dir: str | None):
        self.cfg = cfg
        self.con = con
        self._sources = sources
        self._spill_dir = spill_dir
        self.sources = {name: s.path for name, s in sources.items()}

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
        frame = self.con.execute("SELECT * EXCLUDE (month) FROM macro ORDER BY month_idx").df()
        return frame.set_index("month_idx")

    def frame(self, sql: str, params=None) -> pd.DataFrame:
        try:
            return self.con.execute(sql, params or {}).df()
        except duckdb.Error as exc:
            raise DataError(f"query failed: {_duck_message(exc)}") from None

    def batches(self, sql: str, params, batch_size: int):
        rel = self.con.sql(sql, params=list(params)) if params else self.con.sql(sql)
        with rel.to_arrow_reader(batch_size=batch_size) as reader:
            yield from reader

    def design_sums(self, spec, sql, params, *, collapse, dropped, codes, kind, batch_size, temp_dir, block_rows=FIT_BLOCK_ROWS):
        """Keep the fit's rows in their cell form in temporary Parquet files and sum over them block by block.

        The rows are cut into fixed blocks of ``block_rows`` (whatever the batches of the read), one
        file each; the first pass computes the blocks in as many threads as DuckDB has
        (``duckdb.threads``) and adds their sums in block order; the Newton passes take them in groups
        (:meth:`_CellSums.evaluate`). Memory is bounded by a few blocks.
        """
        design = cell_design(spec)
        threads = int(self.con.execute("SELECT current_setting('threads')").fetchall()[0][0])
        store = _CellStore(design, temp_dir, weighted=collapse)
        needed = {*spec.required_inputs, "outcome", "_cs_weight"}

        def stored_form(item):
            i, table = item
            raw = {name: table.column(name).to_numpy() for name in table.column_names if name in needed}
            block = design.block(raw, collapse, dropped)
            if block is None:
                return i, None
            store.write(i, block)
            return i, block_first_sums(design, block)

        total = None
        pool = pa.default_memory_pool()
        pa.set_memory_pool(pa.system_memory_pool())  # a block's freed buffers go back at once, not to a cache
        try:
            tables = _fixed_blocks(self.batches(sql, params, min(batch_size, block_rows)), block_rows)
            for i, sums in ordered_map(stored_form, enumerate(tables), threads):
                if sums is None:
                    continue
                store.blocks.append(i)
                if total is None:
                    total = sums
                else:
                    total += sums
        except BaseException:
            store.close()
            raise
        finally:
            pa.set_memory_pool(pool)
        first = FirstPass(design.p) if total is None else design.first_pass(total)
        return _CellSums(store, design, first, first.fingerprint(design.names, design.digest()), codes, kind, threads)

    def map_book(self, fn, book, writers, progress=None) -> list:
        """One partition, the whole book, in this process on every core: the writers receive the tables directly."""
        return [fn(book, writers, progress, None)]

    def query(self, sql: str, params=None):
        """Run ``sql`` (with ``params``) and return a DuckDB relation."""
        try:
            return self.con.sql(sql, params=params)
        except duckdb.Error as exc:
            raise DataError(f"query failed: {_duck_message(exc)}") from None

    def columns(self, table: str) -> list[str]:
        """Column names of the internal view ``table``."""
        return [r[0] for r in self.con.execute(f"DESCRIBE {quote_ident(table)}").fetchall()]

    def has_table(self, name: str) -> bool:
        """Whether a view or table ``name`` exists (``macro`` only when configured)."""
        rows = self.con.execute(
            "SELECT 1 FROM duckdb_views() WHERE view_name = $n\n"
            "UNION ALL SELECT 1 FROM duckdb_tables() WHERE table_name = $n",
            {"n": name},
        ).fetchall()
        return bool(rows)

    def close(self) -> None:
        """Close the connection and remove the spill folder."""
        if self.con is not None:
            self.con.close()
            self.con = None
        if self._spill_dir:
            shutil.rmtree(self._spill_dir, ignore_errors=True)
            self._spill_dir = None

    def __enter__(self) -> DuckdbEngine:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self.con is None else "open"
        return f"<DuckdbEngine {state}: {', '.join(f'{k}={v}' for k, v in self.sources.items())}>"


def on_connection(con) -> DuckdbEngine:
    """An engine over an existing DuckDB connection that already holds the views (no config).

    For tests and notebooks that build ``loan_months``, ``panel``, ``loans``
    and ``macro`` themselves; the caller keeps (and closes) ``con``.
    """
    return DuckdbEngine(None, con, {}, None)


def _remove_stale_spill_dirs(prefix: str) -> None:
    """Remove the spill folders of this host's processes that are gone (killed outright, they could not)."""
    for folder in Path(tempfile.gettempdir()).glob(f"{prefix}*-*"):
        pid = folder.name[len(prefix):].rsplit("-", 1)[0]
        if pid.isdigit() and int(pid) != os.getpid() and not process_running(int(pid)):
            shutil.rmtree(folder, ignore_errors=True)


def _connect(cfg: Config):
    # The folder's name carries host and process id, so that a later process can tell a killed run's leftovers.
    prefix = f"creditsurv-duckdb-{socket.gethostname()}-"
    _remove_stale_spill_dirs(prefix)
    spill_dir = tempfile.mkdtemp(prefix=f"{prefix}{os.getpid()}-")
    settings = {"memory_limit": cfg.duckdb.memory_limit, "temp_directory": spill_dir}
    if cfg.duckdb.threads is not None:
        settings["threads"] = cfg.duckdb.threads
    try:
        con = duckdb.connect(":memory:", config=settings)
    except duckdb.Error as exc:
        shutil.rmtree(spill_dir, ignore_errors=True)
        raise ConfigError(f"duckdb: DuckDB rejected the settings ({_duck_message(exc)})") from None
    return con, spill_dir


def open_panel(cfg: Config) -> DuckdbEngine:
    """Register the configured inputs in a new DuckDB connection.

    Parameters
    ----------
    cfg : Config
        The validated run configuration.

    Returns
    -------
    DuckdbEngine
        Holds the views ``panel``, ``panel_all``, ``loans`` and, when
        ``inputs.macro`` is configured, ``macro``.

    Raises
    ------
    DataError
        A file is missing or unreadable, a mapped column is missing, has the
        wrong type or clashes with an internal name. Every column problem is
        listed in one error.
    ConfigError
        DuckDB rejects the ``duckdb`` settings.
    """
    con, spill_dir = _connect(cfg)
    panel = DuckdbEngine(cfg, con, {}, spill_dir)
    try:
        _build_views(panel)
    except BaseException:
        panel.close()
        raise
    return panel


def _build_views(panel: DuckdbEngine) -> None:
    cfg, con = panel.cfg, panel.con
    inputs = input_sources(cfg)
    sources = {name: _register(con, name, key, source) for name, key, source in inputs}
    resolve_inputs(cfg, inputs, sources)

    problems: list[str] = []
    builders = {"panel": _panel_view_sql, "loans": _loans_view_sql, "macro": _macro_view_sql}
    view_sql = {name: builders[name](con, src, cfg, problems) for name, src in sources.items()}
    if problems:
        raise DataError(problem_text(problems))
    try:
        con.execute(f"CREATE VIEW panel_all AS {view_sql['panel']}")
        con.execute(f"CREATE VIEW panel AS SELECT * FROM panel_all WHERE month_idx <= {int(cfg.as_of)}")
        con.execute(f"CREATE VIEW loans AS {view_sql['loans']}")
        if "macro" in view_sql:
            con.execute(f"CREATE VIEW macro AS {view_sql['macro']}")
    except duckdb.Error as exc:  # pragma: no cover - the checks above should prevent it
        raise DataError(f"cannot build the internal views: {_duck_message(exc)}") from None
    panel._sources = sources
    panel.sources = {name: s.path for name, s in sources.items()}


# --------------------------------------------------------------------------- the checks


def _check_sql(check: Check, order: str) -> str:
    return f"""WITH {check.sql}
SELECT (SELECT count(*) FROM offending) AS n,
       CAST((SELECT coalesce(to_json(list(e)), '[]')
             FROM (SELECT * FROM offending ORDER BY {order} LIMIT 5) AS e) AS VARCHAR) AS examples"""


def run_checks(panel: DuckdbEngine) -> pd.DataFrame:
    """Run every data check on ``panel``.

    Returns
    -------
    pandas.DataFrame
        One row per check in a stable order with columns ``check``,
        ``severity`` ('error', 'warning' or 'off'), ``count`` (offending rows,
        loan-months, loans or months; 0 when off), ``examples`` (JSON text of up
        to five offending rows ordered by loan id and month), ``source`` (input
        path), ``columns`` (internal and source names involved) and
        ``description``. The same table is stored in DuckDB as ``data_checks``.
    """
    plans = plan_checks(panel.cfg, panel._sources)
    results = []
    for pl in plans:
        count, examples = 0, "[]"
        if pl.severity != "off":
            try:
                ((count, examples),) = panel.con.execute(
                    _check_sql(dataclasses.replace(pl.check, sql=pl.sql), pl.order), pl.params
                ).fetchall()
            except duckdb.Error as exc:
                raise DataError(f"data check {pl.check.name} on {pl.source} failed: {_duck_message(exc)}") from None
        results.append((count, examples))
    result = check_frame(plans, results)
    _store_checks(panel, result)
    return result


def _store_checks(panel: DuckdbEngine, checks: pd.DataFrame) -> None:
    panel.con.register("_data_checks_frame", checks)
    try:
        panel.con.execute("CREATE OR REPLACE TABLE data_checks AS SELECT * FROM _data_checks_frame")
    finally:
        panel.con.unregister("_data_checks_frame")


# --------------------------------------------------------------------------- events and the book




def label_events(panel: DuckdbEngine) -> None:
    """Create the tables ``loan_outcomes`` and ``loan_months`` on ``panel.con``.

    Parameters
    ----------
    panel : DuckdbEngine
        An open panel (see :func:`creditsurv.engines.open_panel`); its checks
        should have passed, since duplicate or gapped loan-months make the risk
        set meaningless.
    """
    for sql in (LOAN_OUTCOMES_SQL, loan_months_sql(len(panel.cfg.arrears.starts))):
        try:
            panel.con.execute(sql, event_params(panel.cfg, sql))
        except duckdb.Error as exc:
            first = str(exc).strip().splitlines()[0]
            raise DataError(f"event labelling failed on {panel.sources.get('panel')}: {first}") from None


def _has_table(panel: DuckdbEngine, name: str) -> bool:
    rows = panel.con.execute(
        "SELECT 1 FROM duckdb_tables() WHERE database_name = current_database() AND table_name = $name",
        {"name": name},
    ).fetchall()
    return bool(rows)


def event_counts(panel: DuckdbEngine) -> pd.DataFrame:
    """Loans by event and censor reason.

    Labels the events first when ``loan_outcomes`` does not exist yet.

    Returns
    -------
    pandas.DataFrame
        Columns ``event``, ``censor_reason`` (None unless censored), ``loans``
        and ``share`` (of all loans), in the order of :data:`EVENTS`.
    """
    if not _has_table(panel, "loan_outcomes"):
        label_events(panel)
    frame = panel.con.execute(
        """
        SELECT event, censor_reason, count(*) AS loans,
               count(*) / sum(count(*)) OVER () AS share
        FROM loan_outcomes
        GROUP BY event, censor_reason
        ORDER BY list_position(['default', 'prepay', 'maturity', 'censored'], event),
                 censor_reason NULLS FIRST
        """
    ).df()
    reason = frame["censor_reason"].astype(object)
    frame["censor_reason"] = reason.where(reason.notna(), None)
    return frame.astype({"loans": "int64", "share": "float64"})


def book_at_as_of(panel: DuckdbEngine, segment_column: str | None = None) -> pd.DataFrame:
    """The book at the reporting month: every loan still on it, one row each.

    A loan is on the book when it has a panel row at the reporting month with a
    balance above ``events.paid_off_balance`` and was neither prepaid nor
    matured; loans in default (in workout) are on the book and flagged.

    Returns
    -------
    pandas.DataFrame
        Sorted by ``loan_id``: every ``loans`` column, then ``age`` (at the
        reporting month), ``balance``, ``days_past_due``, ``in_default``,
        ``months_since_arrears`` (since the last month at or above the staging
        backstop or in default; 0 now, empty when never), ``arrears_state`` and
        ``segment`` (the value of ``segment_column``, or ``"all"``).
    """
    if not _has_table(panel, "loan_outcomes"):
        label_events(panel)
    cfg = panel.cfg
    segment = f"CAST(l.{quote_ident(segment_column)} AS VARCHAR)" if segment_column else "'all'"
    sql = book_sql(segment, len(cfg.arrears.starts))
    params = event_params(cfg, sql)
    try:
        return panel.con.execute(sql, params).df()
    except duckdb.Error as exc:
        raise DataError(f"cannot build the book at {cfg.as_of}: {exc}") from None


# --------------------------------------------------------------------------- the fit's rows on disk


def _fixed_blocks(batches, rows: int):
    """Arrow tables of exactly ``rows`` rows (the last one shorter) from record batches of any size."""
    pending, count = [], 0
    for batch in batches:
        while batch.num_rows:
            take = min(rows - count, batch.num_rows)
            pending.append(batch.slice(0, take))
            count += take
            batch = batch.slice(take)
            if count == rows:
                yield pa.Table.from_batches(pending)
                pending, count = [], 0
    if count:
        yield pa.Table.from_batches(pending)


class _CellStore:
    """The fit's rows in their cell form in a temporary folder: one small zstd Parquet file per block.

    Columns: the cell code (16 bits), the outcome (8 bits), the weight (collapsed rows only) and each
    atom (float64, as evaluated). Each block is written and read by the thread that computes it, so
    compression runs in parallel too; memory is bounded by the blocks in flight, not by the folder.

    Each float column of a block is encoded by what it holds: a dictionary where it has few distinct
    values (a macro series, a standardised score), otherwise its bytes split by position
    (``BYTE_STREAM_SPLIT``), which lets zstd compress the sign, exponent and leading mantissa bytes
    of a continuous value (current LTV). A dictionary of such a column is as large as the column and
    compresses worse. The encoding changes neither the values read back nor the sums.
    """

    SAMPLE = 4096
    """Values of a column looked at to choose its encoding."""

    def __init__(self, design, temp_dir=None, weighted=False):
        self.dir = Path(tempfile.mkdtemp(prefix="creditsurv-fit-", dir=temp_dir))
        self.weighted = weighted
        fields = [("c", pa.uint16()), ("y", pa.int8())] + ([("w", pa.float64())] if weighted else [])
        fields += [(f"z{k}", pa.float64()) for k in range(len(design.atom_cols))]
        self.schema = pa.schema(fields)
        self.blocks: list[int] = []  # the numbers of the blocks stored, in order

    def _path(self, i: int) -> Path:
        return self.dir / f"block-{i:08d}.parquet"

    def write(self, i: int, block: CellBlock) -> None:
        columns = [block.c, block.y] + ([block.w] if self.weighted else []) + list(block.Z)
        split = [name for name, values in zip(self.schema.names, columns) if values.dtype == np.float64 and self._continuous(values)]
        table = pa.Table.from_arrays(columns, schema=self.schema)
        pq.write_table(
            table, self._path(i), compression="zstd", row_group_size=block.n,
            use_dictionary=[name for name in self.schema.names if name not in split], use_byte_stream_split=split or False,
        )  # fmt: skip

    def _continuous(self, values: np.ndarray) -> bool:
        """Whether nearly every value of a spread sample of the column is distinct (9 in 10 or more)."""
        sample = values[:: max(1, values.shape[0] // self.SAMPLE)]
        return np.unique(sample).shape[0] * 10 >= sample.shape[0] * 9

    def read(self, i: int) -> CellBlock:
        table = pq.ParquetFile(self._path(i)).read(use_threads=False)
        cols = [table.column(k).to_numpy() for k in range(table.num_columns)]
        start = 3 if self.weighted else 2
        Z = np.stack(cols[start:]) if len(cols) > start else np.zeros((0, len(cols[0])))
        return CellBlock(cols[0], cols[1], cols[2] if self.weighted else None, Z)

    @property
    def nbytes(self) -> int:
        return sum(self._path(i).stat().st_size for i in self.blocks)

    def close(self) -> None:
        shutil.rmtree(self.dir, ignore_errors=True)


def _added_in_order(parts):
    """The first of ``parts`` with the others added to it with ``+=``, in their order (sums with a fixed order)."""
    total = None
    for part in parts:
        if total is None:
            total = part
        else:
            total += part
    return total


class _CellSums:
    """The engine's :class:`~creditsurv.engines.DesignSums`: the stored blocks and their first pass."""

    def __init__(self, store: _CellStore, design, first, fingerprint: str, codes, kind: str, threads: int):
        self.store, self.design, self.first, self.fingerprint = store, design, first, fingerprint
        self._codes, self._kind, self._threads = codes, kind, threads
        self._pool = None  # the worker processes of the Newton passes, forked at the first

    def evaluate(self, beta, need_hess):
        """Log-likelihood, score (K, p) and observed information (K*p, K*p) at ``beta`` (K, p).

        The blocks are taken in groups of :data:`~creditsurv.model.FIT_GROUP_BLOCKS`, each group's sums added
        in block order and the groups' in group order: in worker processes forked at the first pass and kept
        for the others (they scale where threads do not: the kernels' many small NumPy calls hold the
        interpreter lock), else in threads. Either way the same bits.
        """
        eta_cell = self.design.prepare(beta)
        blocks = self.store.blocks
        groups = [blocks[i : i + FIT_GROUP_BLOCKS] for i in range(0, len(blocks), FIT_GROUP_BLOCKS)]
        if self._pool is None and worth_forking(len(groups), self._threads):
            self._pool = ProcessPool(self._group_sums, self._threads)
        if self._pool is not None:
            parts = self._pool.map(groups, eta_cell, beta, need_hess)
        else:
            parts = ordered_map(lambda group: self._group_sums(group, eta_cell, beta, need_hess), groups, self._threads)
        return self.design.finish(_added_in_order(parts), beta.shape[0], need_hess)

    def _group_sums(self, group, eta_cell, beta, need_hess):
        """The sums of a group of stored blocks, added in block order."""
        design, read = self.design, self.store.read
        return _added_in_order(block_sums(design, read(i), eta_cell, beta, self._codes, self._kind, need_hess) for i in group)

    def close(self) -> None:
        if self._pool is not None:
            self._pool.close()
            self._pool = None
        self.store.close()
