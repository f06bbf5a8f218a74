"""The data checks: one table of checks, each an SQL body whose last CTE ``offending`` lists the bad rows.

The checks are written once as SQL text; each engine runs ``WITH {sql} ...`` in
its own dialect (:func:`plan_checks` fills the parameters and placeholders).
:func:`raise_for_errors` turns failed checks into a ``DataCheckError`` and
warnings into ``DataCheckWarning``.
"""

from __future__ import annotations

import dataclasses
import fnmatch
import json
import warnings

import pandas as pd

from ..config import Config
from ..errors import (
    DataCheckError,
    DataCheckWarning,
)
from ..sql import quote_ident
from ._inputs import macro_series_used

__all__ = [
    "CHECKS", "CHECK_COLUMNS", "Check", "PlannedCheck", "check_frame", "format_checks",
    "plan_checks", "raise_for_errors",
]  # fmt: skip

Severity = str  # "error" | "warning" | "off"


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
        "panel_values_not_finite", "error", "panel", "rows", ("balance",),
        "Panel rows with an infinite number (or NaN in a pass-through column) in a numeric column the run "
        "uses: the balance and the columns the model or the segments read. A NaN in a mapped column reads "
        "as missing.",
        """offending AS (
            SELECT loan_id, month, {finite_columns} FROM panel WHERE {not_finite})""",
    ),
    Check(
        "balance_above_original", "warning", "panel", "rows", ("balance", "original_balance"),
        "Panel rows whose balance is more than 1.5 times the loan's original balance (common practice: "
        "capitalised arrears rarely add half the loan; more suggests a unit or key error).",
        """offending AS (
            SELECT p.loan_id, p.month, p.balance, l.original_balance
            FROM panel AS p
            JOIN (SELECT loan_id, any_value(original_balance) AS original_balance
                  FROM loans GROUP BY loan_id) AS l USING (loan_id)
            WHERE l.original_balance > 0 AND p.balance > 1.5 * l.original_balance)""",
        needs=("loans",),
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
        "original balance or term, or a note rate that is missing or negative (a rate too high to be "
        "plausible is note_rate_implausible's).",
        """offending AS (
            SELECT loan_id, origination_month, original_balance, note_rate, term FROM loans
            WHERE loan_id IS NULL OR origination_month IS NULL
               OR original_balance IS NULL OR original_balance <= 0
               OR term IS NULL OR term <= 0
               OR note_rate IS NULL OR note_rate < 0)""",
    ),
    Check(
        "loan_values_not_finite", "error", "loans", "rows", ("original_balance", "note_rate", "property_value"),
        "Loan-table rows with an infinite number (or NaN in a pass-through column) in a numeric column the run "
        "uses: original balance, note rate, property value and the columns the model or the segments read. "
        "A NaN in a mapped column reads as missing.",
        """offending AS (
            SELECT loan_id, {finite_columns} FROM loans WHERE {not_finite})""",
    ),
    Check(
        "note_rate_implausible", "error", "loans", "rows", ("note_rate",),
        "Loan-table rows whose note rate is above 30% a year after reading it in inputs.loans.rate_unit "
        "(common practice: no home loan carries such a rate; the rate unit is likely wrong).",
        """offending AS (
            SELECT loan_id, note_rate FROM loans WHERE note_rate > 0.30)""",
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
    Check(
        "macro_values_not_finite", "error", "macro", "months", ("month",),
        "Months up to the reporting month with an infinite value of a macro series (every series of the "
        "history is carried into the scenario paths). A NaN reads as missing.",
        """offending AS (
            SELECT month, {finite_columns} FROM macro
            WHERE month_idx <= $as_of AND ({not_finite}))""",
    ),
    Check(
        "macro_values_negative", "error", "macro", "months", ("month",),
        "Months up to the reporting month with a negative value of a series that cannot be negative "
        "(its name matches checks.non_negative_series, e.g. an unemployment rate or a house-price index).",
        """offending AS (
            SELECT month, {finite_columns} FROM macro
            WHERE month_idx <= $as_of AND ({negative}))""",
    ),
)


_CHECKS_BY_NAME = {c.name: c for c in CHECKS}


CHECK_COLUMNS = ["check", "severity", "count", "examples", "source", "columns", "description"]


@dataclasses.dataclass(frozen=True)
class PlannedCheck:
    """One check as it runs on a given config and set of sources (engine-neutral)."""

    check: Check
    severity: Severity
    source: str
    columns: str
    sql: str  # the CTE list after WITH, placeholders filled
    params: dict  # the $-parameters the SQL uses
    order: str  # ORDER BY of the examples


def plan_checks(cfg: Config, srcs: dict) -> list[PlannedCheck]:
    """The checks that apply to ``srcs``, with severity, labels, SQL and parameters.

    Shared by the engines: each runs ``WITH {sql} ...`` in its own dialect.
    """
    used = macro_series_used(cfg)
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
        source = "; ".join(cfg.relative(srcs[t].path) for t in tables if t in srcs)
        columns = ", ".join(
            srcs[check.table].label(c) if c in srcs[check.table].mapping else c for c in check.columns
        )
        sql = check.sql
        if check.name == "macro_values_missing":
            columns = ", ".join(series)
            sql = sql.replace("{series_columns}", ", ".join(quote_ident(s) for s in series))
            sql = sql.replace("{series_null}", " OR ".join(f"{quote_ident(s)} IS NULL" for s in series))
        if "{finite_columns}" in sql:
            if check.name == "macro_values_negative":
                wanted = non_negative_series(cfg, srcs[check.table])
                test = " OR ".join(f"{quote_ident(c)} < 0" for c in wanted)
                sql = sql.replace("{negative}", test)
            else:
                wanted = finite_columns(cfg, srcs[check.table])
                sql = sql.replace("{not_finite}", " OR ".join(_not_finite(c) for c in wanted))
            if not wanted:
                continue
            columns = ", ".join(srcs[check.table].label(c) if c in srcs[check.table].mapping else c for c in wanted)
            sql = sql.replace("{finite_columns}", ", ".join(quote_ident(c) for c in wanted))
        wanted = {k: v for k, v in params.items() if f"${k}" in sql}
        order = "ALL" if check.table != "macro" else "month"
        plans.append(PlannedCheck(check, severity, source, columns, sql, wanted, order))
    return plans


# Columns of the internal views that are DOUBLE whatever the source (NaN already read as NULL there).
_MAPPED_NUMBERS = {"panel": ("balance",), "loans": ("original_balance", "note_rate", "property_value")}


def _is_float(source_type: str) -> bool:
    """Whether a source column type (DuckDB's or Spark's name) can hold NaN or an infinity."""
    return source_type.lower().startswith(("float", "double", "real"))


def _not_finite(column: str) -> str:
    """SQL true for NaN, +inf or -inf (false for NULL); the same text in DuckDB and Spark."""
    q = quote_ident(column)
    return f"(isnan({q}) OR abs({q}) = CAST('Infinity' AS DOUBLE))"


def finite_columns(cfg: Config, src) -> list[str]:
    """Columns of the internal view of ``src`` that the run uses as numbers and that must be finite.

    The mapped number columns of the panel and the loan table, the pass-through columns of floating
    type that a covariate, the segment bands or the staging read, and every series of the macro history.
    """
    if src.name == "macro":
        month = src.mapping.get("month")
        return [c for c in src.types if c != month and c.lower() not in ("month", "month_idx")]
    mapped = [c for c in _MAPPED_NUMBERS.get(src.name, ()) if src.mapping.get(c)]
    used = [c.column for c in cfg.model.covariates if c.column is not None]
    used += [cfg.segments.band_column, cfg.staging.pd_at_origination_column]
    taken = {v for v in src.mapping.values() if v is not None}
    extra = [c for c in dict.fromkeys(used) if c in src.types and c not in taken and _is_float(src.types[c])]
    return mapped + extra


def non_negative_series(cfg: Config, src) -> list[str]:
    """Macro series of ``src`` whose names match ``checks.non_negative_series`` (shell patterns)."""
    series = finite_columns(cfg, src)
    return [s for s in series if any(fnmatch.fnmatchcase(s.lower(), p.lower()) for p in cfg.checks.non_negative_series)]


def check_frame(plans: list[PlannedCheck], results: list[tuple[int, str]]) -> pd.DataFrame:
    """The check table from the plans and each check's ``(count, examples)``."""
    rows = [
        [pl.check.name, pl.severity, int(count), examples, pl.source, pl.columns, pl.check.description]
        for pl, (count, examples) in zip(plans, results)
    ]
    return pd.DataFrame(rows, columns=CHECK_COLUMNS).astype({"count": "int64"})


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
        if n == 1:  # the one failed check on the first line, as every one-problem message
            lines[0] = lines[0][len("  - "):]
        raise DataCheckError(
            f"{n} data check{'s' if n > 1 else ''} failed on {source}:" + (" " if n == 1 else "\n") + "\n".join(lines)
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


def check_severity(name: str) -> str:
    """The default severity of the data check ``name`` (``checks.severity`` in the config overrides it)."""
    return _CHECKS_BY_NAME[name].severity
