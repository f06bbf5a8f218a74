"""Event labelling: default, prepayment, maturity and censoring of each loan, as SQL text.

An engine's ``label_events`` runs :data:`LOAN_OUTCOMES_SQL` and then
:data:`LOAN_MONTHS_SQL` on the ``panel`` and ``loans`` views, in SQL and out of
core, giving two tables:

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

__all__ = [
    "BOOK_SQL", "CAUSE_CODES", "EVENTS", "LOAN_MONTHS_SQL", "LOAN_OUTCOMES_SQL", "OUTCOME_CONTINUE",
    "OUTCOME_DEFAULT", "OUTCOME_PREPAY", "event_params",
]  # fmt: skip

EVENTS = ("default", "prepay", "maturity", "censored")
"""Event labels of ``loan_outcomes.event``, in report order."""

OUTCOME_CONTINUE, OUTCOME_DEFAULT, OUTCOME_PREPAY = 0, 1, 2
"""Codes of ``loan_months.outcome``: the one definition every stage uses."""

CAUSE_CODES = {"default": OUTCOME_DEFAULT, "prepay": OUTCOME_PREPAY}
"""The competing causes of exit and their outcome codes."""

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
LOAN_MONTHS_SQL = f"""
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

LOAN_OUTCOMES_SQL = f"""
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


def event_params(cfg, sql: str) -> dict:
    """The ``$``-parameters of the event and book SQL that ``sql`` uses, from the config."""
    dd = cfg.default_definition
    params = {
        "dpd": dd.days_past_due,
        "codes": list(dd.status_codes),
        "paid_off": float(cfg.events.paid_off_balance),
        "as_of": int(cfg.as_of),
    }
    return {k: v for k, v in params.items() if f"${k}" in sql}
