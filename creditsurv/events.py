"""Event labelling: default, prepayment, maturity and censoring of each loan.

``label_events(panel)`` reads the ``panel`` and ``loans`` views and creates two
DuckDB tables on ``panel.con``, in SQL and out of core:

``loan_outcomes``  one row per loan: ``loan_id``, ``entry_age``, ``entry_month_idx``,
                   ``last_age``, ``last_month_idx`` (the loan's first and last panel
                   rows), ``event`` ('default', 'prepay', 'maturity' or 'censored'),
                   ``event_age``, ``event_month_idx`` (NULL when censored),
                   ``censor_reason`` ('end_of_window', 'left_panel' or NULL),
                   ``in_default_at_as_of``, ``days_past_due_at_as_of``,
                   ``balance_at_as_of``
``loan_months``    the risk set: each panel row of a loan up to and including its
                   first event, with ``loan_id``, ``month_idx``, ``age`` and
                   ``outcome`` (TINYINT: 0 continue, 1 default, 2 prepay)

Rules. Default is the first row at or past the default definition (days past due
at or above the threshold, or a status code in the list); it is absorbing, so
later rows (workout, charge-off) leave the risk set. Closure is the first row
with balance at or below ``events.paid_off_balance``: before the contractual
term it is a prepayment, at or after it a maturity (outcome 0 on that row; the
loan then leaves the risk set, so maturity censors both hazards). A row that is
both default and closure is a default. A loan with no event is censored at its
last row: ``end_of_window`` when that row is the reporting month, ``left_panel``
when the rows stop earlier.
"""

from __future__ import annotations

import duckdb
import pandas as pd

from .errors import DataError
from .panel import Panel

__all__ = ["EVENTS", "book_at_as_of", "event_counts", "label_events"]

EVENTS = ("default", "prepay", "maturity", "censored")
"""Event labels of ``loan_outcomes.event``, in report order."""

OUTCOME_CONTINUE, OUTCOME_DEFAULT, OUTCOME_PREPAY = 0, 1, 2

# One CTE per step. Parameters: $dpd (threshold or NULL), $codes (status codes),
# $paid_off (closure balance), $as_of (reporting month index). Everything a loan's
# outcome needs comes from one aggregate per loan, so the panel is read once per table.
_FLAGS = """
flagged AS (
    SELECT loan_id, month_idx, age, balance, days_past_due,
           coalesce(days_past_due >= $dpd, FALSE)
               OR coalesce(list_contains(CAST($codes AS VARCHAR[]), status), FALSE) AS is_default,
           coalesce(balance <= $paid_off, FALSE) AS is_closed
    FROM panel
    WHERE loan_id IS NOT NULL
),
per_loan AS (
    SELECT loan_id,
           arg_min(age, month_idx) AS entry_age, min(month_idx) AS entry_month_idx,
           arg_max(age, month_idx) AS last_age, max(month_idx) AS last_month_idx,
           min(month_idx) FILTER (WHERE is_default) AS default_idx,
           arg_min(age, month_idx) FILTER (WHERE is_default) AS default_age,
           min(month_idx) FILTER (WHERE is_closed) AS closed_idx,
           arg_min(age, month_idx) FILTER (WHERE is_closed) AS closed_age,
           any_value(days_past_due) FILTER (WHERE month_idx = $as_of) AS days_past_due_at_as_of,
           any_value(balance) FILTER (WHERE month_idx = $as_of) AS balance_at_as_of,
           count(*) FILTER (WHERE month_idx = $as_of) > 0 AS on_book_at_as_of
    FROM flagged GROUP BY loan_id
),
event_row AS (
    SELECT p.*,
           -- a row that is both default and closure is a default
           default_idx IS NOT NULL AND (closed_idx IS NULL OR default_idx <= closed_idx) AS is_default_event,
           CASE WHEN default_idx IS NOT NULL AND (closed_idx IS NULL OR default_idx <= closed_idx)
                THEN default_idx ELSE closed_idx END AS event_month_idx,
           CASE WHEN default_idx IS NOT NULL AND (closed_idx IS NULL OR default_idx <= closed_idx)
                THEN default_age ELSE closed_age END AS event_age,
           l.term
    FROM per_loan AS p
    LEFT JOIN (SELECT loan_id, any_value(term) AS term FROM loans GROUP BY loan_id) AS l USING (loan_id)
),
labelled AS (
    SELECT *,
           CASE WHEN is_default_event THEN 'default'
                WHEN event_month_idx IS NULL THEN 'censored'
                -- a closure before the contractual term is a prepayment; at or after it, maturity
                WHEN coalesce(event_age < term, TRUE) THEN 'prepay'
                ELSE 'maturity' END AS event
    FROM event_row
)"""

# The risk set reads the (small) outcome table back instead of aggregating the panel again.
_LOAN_MONTHS = f"""
CREATE OR REPLACE TABLE loan_months AS
WITH risk_set AS (
    SELECT p.loan_id, p.month_idx, p.age,
           CASE WHEN p.month_idx = o.event_month_idx AND o.event = 'default' THEN {OUTCOME_DEFAULT}
                WHEN p.month_idx = o.event_month_idx AND o.event = 'prepay' THEN {OUTCOME_PREPAY}
                ELSE {OUTCOME_CONTINUE} END AS outcome
    FROM panel AS p JOIN loan_outcomes AS o USING (loan_id)
    WHERE o.event_month_idx IS NULL OR p.month_idx <= o.event_month_idx
)
SELECT loan_id, CAST(month_idx AS INTEGER) AS month_idx, CAST(age AS INTEGER) AS age,
       CAST(outcome AS TINYINT) AS outcome
FROM risk_set
ORDER BY loan_id, month_idx
"""

_LOAN_OUTCOMES = f"""
CREATE OR REPLACE TABLE loan_outcomes AS
WITH {_FLAGS}
SELECT loan_id,
       CAST(entry_age AS INTEGER) AS entry_age,
       CAST(entry_month_idx AS INTEGER) AS entry_month_idx,
       CAST(last_age AS INTEGER) AS last_age,
       CAST(last_month_idx AS INTEGER) AS last_month_idx,
       event,
       CAST(event_age AS INTEGER) AS event_age,
       CAST(event_month_idx AS INTEGER) AS event_month_idx,
       CASE WHEN event <> 'censored' THEN NULL
            WHEN last_month_idx = $as_of THEN 'end_of_window'
            ELSE 'left_panel' END AS censor_reason,
       -- default is absorbing: a loan on the book at the reporting month stays in default
       on_book_at_as_of AND is_default_event AND event_month_idx <= $as_of AS in_default_at_as_of,
       CAST(days_past_due_at_as_of AS INTEGER) AS days_past_due_at_as_of,
       CAST(balance_at_as_of AS DOUBLE) AS balance_at_as_of
FROM labelled
ORDER BY loan_id
"""


def _params(panel: Panel, sql: str) -> dict:
    cfg = panel.cfg
    dd = cfg.default_definition
    params = {
        "dpd": dd.days_past_due,
        "codes": list(dd.status_codes),
        "paid_off": float(cfg.events.paid_off_balance),
        "as_of": int(cfg.as_of),
    }
    return {k: v for k, v in params.items() if f"${k}" in sql}


def label_events(panel: Panel) -> None:
    """Create the tables ``loan_outcomes`` and ``loan_months`` on ``panel.con``.

    Parameters
    ----------
    panel : Panel
        An open panel (see :func:`creditsurv.panel.open_panel`); its checks
        should have passed, since duplicate or gapped loan-months make the risk
        set meaningless.
    """
    for sql in (_LOAN_OUTCOMES, _LOAN_MONTHS):
        try:
            panel.con.execute(sql, _params(panel, sql))
        except duckdb.Error as exc:
            first = str(exc).strip().splitlines()[0]
            raise DataError(f"event labelling failed on {panel.sources.get('panel')}: {first}") from None


def _has_table(panel: Panel, name: str) -> bool:
    rows = panel.con.execute(
        "SELECT 1 FROM duckdb_tables() WHERE database_name = current_database() AND table_name = $name",
        {"name": name},
    ).fetchall()
    return bool(rows)


def event_counts(panel: Panel) -> pd.DataFrame:
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


BOOK_SQL = """
    SELECT l.*,
           o.last_age AS age,
           o.balance_at_as_of AS balance,
           o.days_past_due_at_as_of AS days_past_due,
           o.in_default_at_as_of AS in_default,
           {segment} AS segment
    FROM loan_outcomes AS o
    JOIN loans AS l USING (loan_id)
    WHERE o.last_month_idx = $as_of
      AND o.event IN ('default', 'censored')
      AND o.balance_at_as_of > $paid_off
    ORDER BY loan_id
"""
"""The book at the reporting month (both engines): ``{segment}`` is the segment expression."""


def book_at_as_of(panel: Panel, segment_column: str | None = None) -> pd.DataFrame:
    """The book at the reporting month: every loan still on it, one row each.

    A loan is on the book when it has a panel row at the reporting month with a
    balance above ``events.paid_off_balance`` and was neither prepaid nor
    matured; loans in default (in workout) are on the book and flagged.

    Returns
    -------
    pandas.DataFrame
        Sorted by ``loan_id``: every ``loans`` column, then ``age`` (at the
        reporting month), ``balance``, ``days_past_due``, ``in_default`` and
        ``segment`` (the value of ``segment_column``, or ``"all"``).
    """
    if not _has_table(panel, "loan_outcomes"):
        label_events(panel)
    from .panel import quote_ident

    sql = BOOK_SQL.format(segment=f"CAST(l.{quote_ident(segment_column)} AS VARCHAR)" if segment_column else "'all'")
    cfg = panel.cfg
    params = {"as_of": int(cfg.as_of), "paid_off": float(cfg.events.paid_off_balance)}
    try:
        return panel.con.execute(sql, params).df()
    except duckdb.Error as exc:
        raise DataError(f"cannot build the book at {cfg.as_of}: {exc}") from None
