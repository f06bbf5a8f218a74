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
import difflib
import glob
import json
import shutil
import tempfile
import warnings
from pathlib import Path

import duckdb
import pandas as pd

from ._months import SQL_MONTH_INDEX
from .config import Config
from .errors import ConfigError, DataCheckError, DataCheckWarning, DataError

__all__ = [
    "CHECKS",
    "Panel",
    "format_checks",
    "open_panel",
    "quote_ident",
    "raise_for_errors",
    "run_checks",
]

Severity = str  # "error" | "warning" | "off"


def quote_ident(name: str) -> str:
    """Return ``name`` as a DuckDB identifier: in double quotes, inner quotes doubled."""
    return '"' + str(name).replace('"', '""') + '"'


def _month_idx(col: str) -> str:
    return SQL_MONTH_INDEX.format(col=col)


# --------------------------------------------------------------------------- the sources

_NUMERIC_TYPES = (
    "TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT",
    "UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT", "UHUGEINT",
    "FLOAT", "DOUBLE", "DECIMAL",
)
_DATE_TYPES = ("DATE", "TIMESTAMP")
_TEXT_TYPES = ("VARCHAR",)

_PANEL_INTERNAL = ("loan_id", "month", "month_idx", "age", "balance", "days_past_due", "status")
_LOAN_INTERNAL = (
    "loan_id", "origination_month", "origination_idx", "original_balance",
    "note_rate", "term", "property_value",
)
_MACRO_INTERNAL = ("month", "month_idx")


def _is_numeric(duck_type: str) -> bool:
    return duck_type.upper().startswith(_NUMERIC_TYPES)


@dataclasses.dataclass
class _Source:
    """One registered input: where it is and how its columns map."""

    name: str  # internal table name: panel, loans, macro
    key: str  # config key of the source: inputs.panel
    path: Path
    raw_view: str  # view over the file, source column names
    types: dict[str, str]  # source column -> DuckDB type
    mapping: dict[str, str | None]  # internal column -> source column (None: unmapped)

    def label(self, internal: str) -> str:
        src = self.mapping.get(internal)
        return internal if src is None or src == internal else f"{internal} ({src})"


def _file_format(source) -> str:
    if source.format != "auto":
        return source.format
    return {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".duckdb": "duckdb", ".db": "duckdb"}[
        source.path.suffix.lower()
    ]


def _closest(word: str, choices) -> str:
    match = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.5)
    if not match:
        lowered = {c.lower(): c for c in choices}
        match = difflib.get_close_matches(word.lower(), list(lowered), n=1, cutoff=0.5)
        match = [lowered[m] for m in match]
    return f"; closest match: {match[0]!r}" if match else ""


def _register(con, name: str, key: str, source) -> _Source:
    """Create the raw view ``_src_<name>`` over ``source`` and describe it."""
    path = Path(source.path)
    fmt = _file_format(source)
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
                    f"(tables: {', '.join(tables) or 'none'}){_closest(source.table, tables)}"
                )
            con.execute(
                f"CREATE VIEW {quote_ident(raw_view)} AS "
                f"SELECT * FROM {quote_ident(alias)}.{quote_ident(source.table)}"
            )
        described = con.execute(f"DESCRIBE {quote_ident(raw_view)}").fetchall()
    except duckdb.Error as exc:
        raise DataError(f"{key}.path: cannot read {path} as {fmt}: {_duck_message(exc)}") from None
    types = {row[0]: str(row[1]) for row in described}
    return _Source(name, key, path, raw_view, types, {})


def _duck_message(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def _resolve_columns(src: _Source, wanted: dict[str, str | None], problems: list[str]) -> None:
    """Fill ``src.mapping``; record a problem for each mapped column not in the source."""
    available = list(src.types)
    lowered = {c.lower(): c for c in available}
    for internal, column in wanted.items():
        if column is None:
            src.mapping[internal] = None
            continue
        if column in src.types:
            src.mapping[internal] = column
        elif column.lower() in lowered:  # DuckDB resolves names without regard to case
            src.mapping[internal] = lowered[column.lower()]
        else:
            problems.append(
                f"{src.path}: {src.key}.columns.{internal}: column {column!r} not found"
                f"{_closest(column, available)} (available: {', '.join(available)})"
            )


def _offending_value(con, src: _Source, column: str, test: str) -> str | None:
    """First value (in file order) of ``column`` for which SQL predicate ``test`` holds."""
    row = con.execute(
        f"SELECT CAST(v AS VARCHAR) FROM (SELECT {quote_ident(column)} AS v FROM {quote_ident(src.raw_view)}) "
        f"WHERE v IS NOT NULL AND ({test}) LIMIT 1"
    ).fetchall()
    return row[0][0] if row else None


def _numeric_expr(con, src: _Source, internal: str, column: str, problems: list[str], key: str) -> str:
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


def _month_expr(src: _Source, column: str, problems: list[str], key: str) -> str:
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


def _passthrough(src: _Source, internal_names, problems: list[str]) -> list[str]:
    """Quoted source columns that are not mapped; a clash with an internal name is a problem."""
    mapped = {c for c in src.mapping.values() if c is not None}
    reserved = {n.lower() for n in internal_names}
    out = []
    for column in src.types:
        if column in mapped:
            continue
        if column.lower() in reserved:
            problems.append(
                f"{src.path}: unmapped column {column!r} has the name of an internal {src.name} column; "
                f"map it in {src.key}.columns.{column.lower()} or rename it in the source"
            )
            continue
        out.append(quote_ident(column))
    return out


# --------------------------------------------------------------------------- the views

def _panel_view_sql(con, src: _Source, cfg: Config, problems: list[str]) -> str:
    m, key = src.mapping, f"{src.key}.columns"
    num = {
        c: _numeric_expr(con, src, c, m[c], problems, f"{key}.{c}")
        for c in ("age", "balance", "days_past_due")
        if m.get(c)
    }
    month = _month_expr(src, m["month"], problems, f"{key}.month") if m.get("month") else "NULL"
    status = f"CAST({quote_ident(m['status'])} AS VARCHAR)" if m.get("status") else "CAST(NULL AS VARCHAR)"
    rest = _passthrough(src, _PANEL_INTERNAL, problems)
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
       CAST({_month_idx('month')} AS INTEGER) AS month_idx,
       TRY_CAST(round(_age) AS INTEGER) AS age,
       balance,
       TRY_CAST(round(_dpd) AS INTEGER) AS days_past_due,
       status{extra}
FROM typed"""


def _loans_view_sql(con, src: _Source, cfg: Config, problems: list[str]) -> str:
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
    rest = _passthrough(src, _LOAN_INTERNAL, problems)
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
       CAST({_month_idx('origination_month')} AS INTEGER) AS origination_idx,
       original_balance,
       note_rate,
       TRY_CAST(round(_term) AS INTEGER) AS term,
       property_value{extra}
FROM typed"""


def _macro_view_sql(con, src: _Source, cfg: Config, problems: list[str]) -> str:
    month_col = src.mapping["month"]
    month = _month_expr(src, month_col, problems, f"{src.key}.columns.month")
    series = []
    for column in src.types:
        if column == month_col:
            continue
        if column.lower() in _MACRO_INTERNAL:
            problems.append(
                f"{src.path}: series column {column!r} has the name of an internal macro column; rename it"
            )
            continue
        expr = _numeric_expr(con, src, column, column, problems, f"series {column!r}")
        series.append(f"{expr} AS {quote_ident(column)}")
    extra = "".join(f",\n           {s}" for s in series)
    names = "".join(f",\n       {quote_ident(c)}" for c in src.types if c != month_col and c.lower() not in _MACRO_INTERNAL)
    return f"""
WITH typed AS (
    SELECT {month} AS month{extra}
    FROM {quote_ident(src.raw_view)}
)
SELECT month,
       CAST({_month_idx('month')} AS INTEGER) AS month_idx{names}
FROM typed"""


def _macro_series_used(cfg: Config) -> list[tuple[str, str, int]]:
    """``(config key, series, lag)`` for every macro covariate of the model."""
    return [
        (f"model.covariates[{i}].macro", c.macro, c.lag)
        for i, c in enumerate(cfg.model.covariates)
        if c.macro is not None
    ]


class Panel:
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

    def __init__(self, cfg: Config, con, sources: dict[str, _Source], spill_dir: str | None):
        self.cfg = cfg
        self.con = con
        self._sources = sources
        self._spill_dir = spill_dir
        self.sources = {name: s.path for name, s in sources.items()}

    def query(self, sql: str, params=None):
        """Run ``sql`` (with ``params``) and return a DuckDB relation."""
        try:
            return self.con.sql(sql, params=params)
        except duckdb.Error as exc:
            raise DataError(f"query failed: {_duck_message(exc)}") from None

    def columns(self, table: str) -> list[str]:
        """Column names of the internal view ``table``."""
        return [r[0] for r in self.con.execute(f"DESCRIBE {quote_ident(table)}").fetchall()]

    def close(self) -> None:
        """Close the connection and remove the spill folder."""
        if self.con is not None:
            self.con.close()
            self.con = None
        if self._spill_dir:
            shutil.rmtree(self._spill_dir, ignore_errors=True)
            self._spill_dir = None

    def __enter__(self) -> Panel:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "closed" if self.con is None else "open"
        return f"<Panel {state}: {', '.join(f'{k}={v}' for k, v in self.sources.items())}>"


def _connect(cfg: Config):
    spill_dir = tempfile.mkdtemp(prefix="creditsurv-duckdb-")
    settings = {"memory_limit": cfg.duckdb.memory_limit, "temp_directory": spill_dir}
    if cfg.duckdb.threads is not None:
        settings["threads"] = cfg.duckdb.threads
    try:
        con = duckdb.connect(":memory:", config=settings)
    except duckdb.Error as exc:
        shutil.rmtree(spill_dir, ignore_errors=True)
        raise ConfigError(f"duckdb: DuckDB rejected the settings ({_duck_message(exc)})") from None
    return con, spill_dir


def _check_severity_names(cfg: Config) -> None:
    names = [c.name for c in CHECKS]
    problems = [
        f"checks.severity.{name}: unknown data check{_closest_check(name, names)}"
        for name in cfg.checks.severity
        if name not in names
    ]
    if problems:
        lines = "\n".join(f"  - {p}" for p in problems)
        raise ConfigError(f"config: {len(problems)} problem(s) in the config:\n{lines}", problems)


def _closest_check(name: str, names) -> str:
    match = difflib.get_close_matches(name, names, n=1, cutoff=0.5)
    return f"; did you mean '{match[0]}'?" if match else f" (valid names: {', '.join(names)})"


def open_panel(cfg: Config) -> Panel:
    """Register the configured inputs in a new DuckDB connection.

    Parameters
    ----------
    cfg : Config
        The validated run configuration.

    Returns
    -------
    Panel
        Holds the views ``panel``, ``panel_all``, ``loans`` and, when
        ``inputs.macro`` is configured, ``macro``.

    Raises
    ------
    DataError
        A file is missing or unreadable, a mapped column is missing, has the
        wrong type or clashes with an internal name. Every column problem is
        listed in one error.
    ConfigError
        ``checks.severity`` names an unknown check, or DuckDB rejects the
        ``duckdb`` settings.
    """
    _check_severity_names(cfg)
    con, spill_dir = _connect(cfg)
    panel = Panel(cfg, con, {}, spill_dir)
    try:
        _build_views(panel)
    except BaseException:
        panel.close()
        raise
    return panel


def _input_sources(cfg) -> list[tuple[str, str, object]]:
    """``(view name, config key, source config)`` of every configured input."""
    inputs = [("panel", "inputs.panel", cfg.inputs.panel), ("loans", "inputs.loans", cfg.inputs.loans)]
    if cfg.inputs.macro is not None:
        inputs.append(("macro", "inputs.macro", cfg.inputs.macro))
    return inputs


def _resolve_inputs(cfg, inputs, sources) -> None:
    """Find every mapped column and every macro series the model uses; raise all problems at once.

    Shared by both engines: only the registration of the files differs.
    """
    problems: list[str] = []
    for name, _key, source in inputs:
        wanted = {f.name: getattr(source.columns, f.name) for f in dataclasses.fields(source.columns)}
        _resolve_columns(sources[name], wanted, problems)
    if "macro" in sources:
        series = set(sources["macro"].types) - {sources["macro"].mapping.get("month")}
        for key, name, _lag in _macro_series_used(cfg):
            if name not in series:
                problems.append(
                    f"{sources['macro'].path}: {key}: macro series {name!r} not found"
                    f"{_closest(name, sorted(series))} (series: {', '.join(sorted(series))})"
                )
    if problems:
        raise DataError(_problem_text(problems))


def _build_views(panel: Panel) -> None:
    cfg, con = panel.cfg, panel.con
    inputs = _input_sources(cfg)
    sources = {name: _register(con, name, key, source) for name, key, source in inputs}
    _resolve_inputs(cfg, inputs, sources)

    problems: list[str] = []
    builders = {"panel": _panel_view_sql, "loans": _loans_view_sql, "macro": _macro_view_sql}
    view_sql = {name: builders[name](con, src, cfg, problems) for name, src in sources.items()}
    if problems:
        raise DataError(_problem_text(problems))
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


def _problem_text(problems: list[str]) -> str:
    n = len(problems)
    lines = "\n".join(f"  - {p}" for p in problems)
    return f"{n} problem{'s' if n > 1 else ''} with the input data:\n{lines}"


# --------------------------------------------------------------------------- the checks


@dataclasses.dataclass(frozen=True)
class Check:
    """One data check: an SQL body whose last CTE ``offending`` lists the bad rows.

    ``sql`` is the CTE list after ``WITH`` (without the word); it may refer to
    ``$as_of``, ``$paid_off``, ``$first_macro`` and ``$macro_series`` via
    parameters and to the ``{series_null}`` placeholder (macro checks).
    """

    name: str
    severity: Severity
    table: str  # the source the count refers to: panel, loans, macro
    unit: str  # rows, loans, loan-months, months
    columns: tuple[str, ...]  # internal columns involved
    description: str
    sql: str
    needs: tuple[str, ...] = ()  # extra sources the check reads


# The one table of checks and their default severities, in report order.
_SUSPECT_LOANS = """suspect AS (
            -- A loan whose months are exactly min..max, once each, has as many rows as months
            -- in its span and the sum and sum of squares of that run; only the other loans
            -- are examined row by row (a cheap aggregate instead of a sort of the whole panel).
            SELECT loan_id FROM panel GROUP BY loan_id
            HAVING count(*) <> max(month_idx) - min(month_idx) + 1
                OR sum(CAST(month_idx AS BIGINT)) * 2 <> (min(month_idx) + max(month_idx)) * count(*)
                OR sum(CAST(month_idx AS BIGINT) * month_idx) <>
                   CAST(max(month_idx) AS BIGINT) * (max(month_idx) + 1) * (2 * max(month_idx) + 1) / 6
                   - CAST(min(month_idx) - 1 AS BIGINT) * min(month_idx) * (2 * min(month_idx) - 1) / 6),"""
"""Loans whose rows are not one clean run of months: the only ones the duplicate
and gap checks examine row by row."""


CHECKS: tuple[Check, ...] = (
    Check(
        "panel_keys_missing", "error", "panel", "rows", ("loan_id", "month"),
        "Panel rows whose loan id is empty or whose month is missing or not a readable month.",
        """offending AS (
            SELECT loan_id, month, month_idx, age FROM panel_all
            WHERE loan_id IS NULL OR month IS NULL)""",
    ),
    Check(
        "duplicate_loan_months", "error", "panel", "loan-months", ("loan_id", "month"),
        "Loan-months that appear in more than one panel row.",
        _SUSPECT_LOANS + """
        offending AS (
            SELECT loan_id, month, count(*) AS rows FROM panel
            WHERE loan_id IN (SELECT loan_id FROM suspect)
            GROUP BY loan_id, month HAVING count(*) > 1)""",
    ),
    Check(
        "month_gaps", "error", "panel", "rows", ("loan_id", "month"),
        "Panel rows more than one month after the loan's previous row.",
        _SUSPECT_LOANS + """
        ordered AS (
            SELECT loan_id, month, month_idx,
                   lag(month) OVER w AS previous_month,
                   month_idx - lag(month_idx) OVER w AS step
            FROM panel
            WHERE loan_id IN (SELECT loan_id FROM suspect)
            WINDOW w AS (PARTITION BY loan_id ORDER BY month_idx)),
        offending AS (
            SELECT loan_id, month, previous_month, step - 1 AS missing_months
            FROM ordered WHERE step > 1)""",
    ),
    Check(
        "age_mismatch", "error", "panel", "rows", ("age", "month", "origination_month"),
        "Panel rows whose age is not the months since the loan's origination month.",
        """offending AS (
            SELECT p.loan_id, p.month, p.age, p.month_idx - l.origination_idx AS expected_age
            FROM panel AS p
            JOIN (SELECT loan_id, any_value(origination_idx) AS origination_idx
                  FROM loans GROUP BY loan_id) AS l USING (loan_id)
            WHERE l.origination_idx IS NOT NULL
              AND p.age IS DISTINCT FROM p.month_idx - l.origination_idx)""",
        needs=("loans",),
    ),
    Check(
        "rows_after_closure", "error", "panel", "rows", ("balance", "month"),
        "Panel rows after the loan's first month with a paid-off balance.",
        """closed AS (
            SELECT loan_id, min(month_idx) AS closed_idx, min(month) AS closed_month FROM panel
            WHERE balance <= $paid_off GROUP BY loan_id),
        offending AS (
            SELECT p.loan_id, p.month, p.balance, c.closed_month
            FROM panel AS p JOIN closed AS c USING (loan_id)
            WHERE p.month_idx > c.closed_idx)""",
    ),
    Check(
        "balance_missing", "error", "panel", "rows", ("balance",),
        "Panel rows without a balance.",
        """offending AS (
            SELECT loan_id, month, balance FROM panel WHERE balance IS NULL)""",
    ),
    Check(
        "balance_negative", "error", "panel", "rows", ("balance",),
        "Panel rows with a negative balance.",
        """offending AS (
            SELECT loan_id, month, balance FROM panel WHERE balance < 0)""",
    ),
    Check(
        "days_past_due_invalid", "error", "panel", "rows", ("days_past_due",),
        "Panel rows whose days past due are missing or negative.",
        """offending AS (
            SELECT loan_id, month, days_past_due FROM panel
            WHERE days_past_due IS NULL OR days_past_due < 0)""",
    ),
    Check(
        "panel_loans_not_in_loan_table", "error", "panel", "loans", ("loan_id",),
        "Loans in the panel that have no row in the loan table.",
        """offending AS (
            SELECT loan_id, min(month) AS first_month, count(*) AS rows FROM panel
            WHERE loan_id IS NOT NULL
              AND loan_id NOT IN (SELECT loan_id FROM loans WHERE loan_id IS NOT NULL)
            GROUP BY loan_id)""",
        needs=("loans",),
    ),
    Check(
        "loans_without_panel_rows", "warning", "loans", "loans", ("loan_id",),
        "Loans in the loan table that have no row in the panel.",
        """offending AS (
            SELECT l.loan_id, l.origination_month FROM loans AS l
            WHERE l.loan_id IS NOT NULL
              AND NOT EXISTS (SELECT 1 FROM panel_all AS p WHERE p.loan_id = l.loan_id))""",
        needs=("panel",),
    ),
    Check(
        "loan_table_duplicates", "error", "loans", "loans", ("loan_id",),
        "Loan ids that appear in more than one row of the loan table.",
        """offending AS (
            SELECT loan_id, count(*) AS rows FROM loans
            GROUP BY loan_id HAVING count(*) > 1)""",
    ),
    Check(
        "loan_fields_invalid", "error", "loans", "rows",
        ("loan_id", "origination_month", "original_balance", "note_rate", "term"),
        "Loan-table rows with no loan id or origination month, a missing or non-positive "
        "original balance or term, or a missing or negative note rate.",
        """offending AS (
            SELECT loan_id, origination_month, original_balance, note_rate, term FROM loans
            WHERE loan_id IS NULL OR origination_month IS NULL
               OR original_balance IS NULL OR original_balance <= 0
               OR term IS NULL OR term <= 0
               OR note_rate IS NULL OR note_rate < 0)""",
    ),
    Check(
        "months_after_as_of", "warning", "panel", "rows", ("month",),
        "Panel rows after the reporting month; they are left out of the panel.",
        """offending AS (
            SELECT loan_id, month FROM panel_all WHERE month_idx > $as_of)""",
    ),
    Check(
        "macro_duplicate_months", "error", "macro", "months", ("month",),
        "Months that appear in more than one row of the macro history.",
        """offending AS (
            SELECT month, count(*) AS rows FROM macro
            WHERE month IS NOT NULL GROUP BY month HAVING count(*) > 1)""",
    ),
    Check(
        "macro_months_missing", "error", "macro", "months", ("month",),
        "Calendar months missing from the macro history between the development window start "
        "less the largest macro lag and the reporting month.",
        """calendar AS (
            SELECT CAST(i AS INTEGER) AS month_idx FROM range($first_macro, $as_of + 1) AS r(i)),
        offending AS (
            SELECT make_date(CAST(month_idx // 12 AS INTEGER), CAST(month_idx % 12 + 1 AS INTEGER), 1) AS month
            FROM calendar
            WHERE month_idx NOT IN (SELECT month_idx FROM macro WHERE month_idx IS NOT NULL))""",
    ),
    Check(
        "macro_values_missing", "error", "macro", "months", ("month",),
        "Months between the development window start less the largest macro lag and the "
        "reporting month with a missing value of a macro series the model uses.",
        """offending AS (
            SELECT month, {series_columns} FROM macro
            WHERE month_idx BETWEEN $first_macro AND $as_of AND ({series_null}))""",
    ),
)

_CHECKS_BY_NAME = {c.name: c for c in CHECKS}

_CHECK_COLUMNS = ["check", "severity", "count", "examples", "source", "columns", "description"]


def _check_sql(check: Check, order: str) -> str:
    return f"""WITH {check.sql}
SELECT (SELECT count(*) FROM offending) AS n,
       CAST((SELECT coalesce(to_json(list(e)), '[]')
             FROM (SELECT * FROM offending ORDER BY {order} LIMIT 5) AS e) AS VARCHAR) AS examples"""


@dataclasses.dataclass(frozen=True)
class _PlannedCheck:
    """One check as it runs on a given config and set of sources (engine-neutral)."""

    check: Check
    severity: Severity
    source: str
    columns: str
    sql: str  # the CTE list after WITH, placeholders filled
    params: dict  # the $-parameters the SQL uses
    order: str  # ORDER BY of the examples


def _plan_checks(cfg: Config, srcs: dict) -> list[_PlannedCheck]:
    """The checks that apply to ``srcs``, with severity, labels, SQL and parameters.

    Shared by the engines: each runs ``WITH {sql} ...`` in its own dialect.
    """
    used = _macro_series_used(cfg)
    max_lag = max((lag for _k, _s, lag in used), default=0)
    params = {
        "as_of": int(cfg.as_of),
        "paid_off": float(cfg.events.paid_off_balance),
        "first_macro": int(cfg.windows.development.start) - max_lag,
    }
    series = sorted({s for _k, s, _l in used})
    plans = []
    for check in CHECKS:
        if check.table not in srcs:
            continue
        if check.name == "macro_values_missing" and not series:
            continue
        severity = cfg.checks.severity.get(check.name, check.severity)
        tables = (check.table, *check.needs)
        source = "; ".join(str(srcs[t].path) for t in tables if t in srcs)
        columns = ", ".join(
            srcs[check.table].label(c) if c in srcs[check.table].mapping else c for c in check.columns
        )
        sql = check.sql
        if check.name == "macro_values_missing":
            columns = ", ".join(series)
            sql = sql.replace("{series_columns}", ", ".join(quote_ident(s) for s in series))
            sql = sql.replace("{series_null}", " OR ".join(f"{quote_ident(s)} IS NULL" for s in series))
        wanted = {k: v for k, v in params.items() if f"${k}" in sql}
        order = "ALL" if check.table != "macro" else "month"
        plans.append(_PlannedCheck(check, severity, source, columns, sql, wanted, order))
    return plans


def _check_frame(plans: list[_PlannedCheck], results: list[tuple[int, str]]) -> pd.DataFrame:
    """The check table from the plans and each check's ``(count, examples)``."""
    rows = [
        [pl.check.name, pl.severity, int(count), examples, pl.source, pl.columns, pl.check.description]
        for pl, (count, examples) in zip(plans, results)
    ]
    return pd.DataFrame(rows, columns=_CHECK_COLUMNS).astype({"count": "int64"})


def run_checks(panel: Panel) -> pd.DataFrame:
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
    plans = _plan_checks(panel.cfg, panel._sources)
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
    result = _check_frame(plans, results)
    _store_checks(panel, result)
    return result


def _store_checks(panel: Panel, checks: pd.DataFrame) -> None:
    panel.con.register("_data_checks_frame", checks)
    try:
        panel.con.execute("CREATE OR REPLACE TABLE data_checks AS SELECT * FROM _data_checks_frame")
    finally:
        panel.con.unregister("_data_checks_frame")


def _first_example(examples: str) -> str:
    text = examples.strip()
    if text in ("", "[]"):
        return ""
    first = json.loads(text)[0]
    return ", ".join(f"{k}={v}" for k, v in first.items())


def _check_line(row) -> str:
    check = _CHECKS_BY_NAME.get(row["check"])
    unit = check.unit if check else "rows"
    example = _first_example(row["examples"])
    return f"{row['check']}: {row['count']} {unit}" + (f" (e.g. {example})" if example else "")


def raise_for_errors(checks: pd.DataFrame) -> None:
    """Raise for failed error checks; warn for fired warning checks.

    Raises
    ------
    DataCheckError
        When a check of severity ``error`` has a nonzero count. The message
        names every failed check with its count and first example (and lists
        the fired warnings too).

    Warns
    -----
    DataCheckWarning
        One per fired check of severity ``warning``, when no error check failed.
    """
    fired = checks[checks["count"] > 0]
    errors = fired[fired["severity"] == "error"]
    warns = fired[fired["severity"] == "warning"]
    if len(errors):
        lines = [f"  - {_check_line(r)}" for _, r in errors.iterrows()]
        if len(warns):
            lines.append("  warnings:")
            lines.extend(f"  - {_check_line(r)}" for _, r in warns.iterrows())
        n = len(errors)
        source = "; ".join(dict.fromkeys(errors["source"]))
        raise DataCheckError(
            f"{n} data check{'s' if n > 1 else ''} failed on {source}:\n" + "\n".join(lines)
            + "\nFix the data, or change a check's severity under checks.severity in the config."
        )
    for _, r in warns.iterrows():
        warnings.warn(DataCheckWarning(_check_line(r)), stacklevel=2)


def format_checks(checks: pd.DataFrame) -> str:
    """One line per check: OK, WARN, FAIL or OFF, the name and the count."""
    lines = []
    width = max((len(n) for n in checks["check"]), default=0)
    for _, r in checks.iterrows():
        if r["severity"] == "off":
            flag = "OFF "
        elif r["count"] == 0:
            flag = "OK  "
        else:
            flag = "FAIL" if r["severity"] == "error" else "WARN"
        lines.append(f"{flag} {r['check']:<{width}} {r['count']:>10,}")
    return "\n".join(lines)
