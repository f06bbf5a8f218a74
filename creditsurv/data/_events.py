"""Event labelling: default, prepayment, maturity and censoring of each loan, as SQL text.

An engine's ``label_events`` runs :data:`LOAN_OUTCOMES_SQL` and then
:data:`LOAN_MONTHS_SQL` on the ``panel`` and ``loans`` views, in SQL and out of
core, giving two tables:

``loan_outcomes``  one row per loan: ``loan_id``, ``entry_age``, ``entry_month_idx``,
                   ``last_age``, ``last_month_idx`` (the loan's first and last panel
                   rows), ``event`` ('default', 'prepay', 'maturity' or 'censored'),
                   ``event_age``, ``event_month_idx`` (NULL when censored),
                   ``censor_reason`` ('end_of_window', 'left_panel' or NULL),
                   ``in_default_at_as_of``, ``in_cure_period_at_as_of``,
                   ``days_past_due_at_as_of``, ``balance_at_as_of``,
                   ``last_arrears_month_idx`` (the last month up to the reporting
                   month at or above ``staging.dpd_backstop`` days past due or
                   meeting the default definition; NULL when none),
                   ``default_start_month_idx`` (the first month of the default the
                   loan is in at the reporting month, after any cured one; NULL when
                   it has not defaulted by then), ``months_in_arrears_at_default``
                   (months from the last month under 30 days past due up to that
                   default's start: the instalments it missed) and ``balance_at_onset``
                   (that month's balance; both NULL when the panel has no such month).
                   The event is
                   the loan's first: with cures, later spells are in ``loan_months``.
``loan_months``    the risk set: each panel row of a loan at risk (see Cures), up to
                   and including its closure, with ``loan_id``, ``month_idx``,
                   ``age``, ``outcome`` (TINYINT: 0 continue, 1 default, 2 prepay),
                   ``origin_state`` and ``destination`` (TINYINT, see below) and
                   ``previously_defaulted`` (TINYINT 1 in a spell after a cured default)

Rules. Default is the first row of a spell at or past the default definition (days
past due at or above the threshold, or a status code in the list). Closure is the
first row with balance at or below ``events.paid_off_balance``: before the
contractual term it is a prepayment, at or after it a maturity (outcome 0 on that
row; the loan then leaves the risk set, so maturity censors both hazards). A row
that is both default and closure is a default. A loan with no event is censored at
its last row: ``end_of_window`` when that row is the reporting month,
``left_panel`` when the rows stop earlier.

Cures. With no ``default_definition.cure_months`` default is absorbing: later rows
(workout, charge-off) leave the risk set and the loan stays in default. With a cure
period of C months a loan is in default from a default month d until it has met no
default condition for C months in a row: in months d ... d + C - 1 when nothing
defaults again (``in_default_at_as_of``; ``in_cure_period_at_as_of`` when the
reporting month itself meets no default condition). It is cured at the end of
month d + C and at risk again from month d + C + 1, a new spell whose months carry
``previously_defaulted`` = 1; its origin state is its arrears state at the end of
month d + C, and its next default is an event again.

Arrears states. Before default a loan is in one of the transient states of
``arrears.starts``: 0 ``current`` (days past due below the first start), 1 the
first arrears state (``30-59``), 2 the next (``60-89``), ... A month's
transition runs from the state at the end of the previous month,
``origin_state``, to the state at the end of the month, coded relative to the
origin as ``destination``: 0 stayed in the origin state (the reference of the
multi-state model), 1 default, 2 prepaid, ``3 + k`` moved to transient state
``k``. The origin of a loan's first panel row is ``current`` when that row is
its first month on book (age 1 or less) and unknown (NULL, and so the
destination) for a loan first seen later. With no arrears states every month
starts in the one state, current, and the destination equals ``outcome``. A maturity row is a month like any other: its destination is
read from its days past due.
"""

from __future__ import annotations

__all__ = [
    "ABSORBING_STATES", "CAUSE_CODES", "DEFAULT_ROUTES_SQL", "DESTINATION_MOVE", "EVENTS", "LOAN_OUTCOMES_SQL", "OUTCOME_CONTINUE",
    "OUTCOME_DEFAULT", "OUTCOME_PREPAY", "PREVIOUSLY_DEFAULTED", "TRANSITION_COUNTS_SQL", "arrears_state_sql", "book_sql", "event_params", "panel_history_sql",
    "loan_months_sql",
]  # fmt: skip

EVENTS = ("default", "prepay", "maturity", "censored")
"""Event labels of ``loan_outcomes.event``, in report order."""

OUTCOME_CONTINUE, OUTCOME_DEFAULT, OUTCOME_PREPAY = 0, 1, 2
"""Codes of ``loan_months.outcome``: the one definition every stage uses."""

CAUSE_CODES = {"default": OUTCOME_DEFAULT, "prepay": OUTCOME_PREPAY}
"""The competing causes of exit and their outcome codes."""

DESTINATION_MOVE = 3
"""``loan_months.destination`` of a move to transient state ``k`` is ``DESTINATION_MOVE + k``."""

ABSORBING_STATES = {"default": OUTCOME_DEFAULT, "prepaid": OUTCOME_PREPAY}
"""The absorbing states and their destination codes (the cause codes of ``outcome``)."""

PREVIOUSLY_DEFAULTED = "previously_defaulted"
"""The risk-set and book column that is 1 in a spell after a cured default: a covariate by this name."""


def arrears_state_sql(column: str, n_starts: int) -> str:
    """SQL of the transient state (0 current, 1, 2, ...) of a days-past-due ``column``.

    The state is the number of ``arrears.starts`` the value reaches; the starts are the
    parameters ``$arrears_1`` ... (see :func:`event_params`). A NULL value is current.
    """
    if n_starts == 0:
        return "0"
    return " + ".join(f"CAST(coalesce({column} >= $arrears_{i}, FALSE) AS INTEGER)" for i in range(1, n_starts + 1))

# One CTE per step. Parameters: $dpd (threshold or NULL), $codes (status codes),
# $paid_off (closure balance), $as_of (reporting month index), $backstop (the staging's
# days past due), $cure (cure period in months, or NULL). Everything a loan's
# outcome needs comes from one aggregate per loan, so the panel is read once per table.
_FLAGGED = """flagged AS (
    SELECT loan_id, month_idx, age, balance, days_past_due,
           coalesce(days_past_due >= $dpd, FALSE)
               OR coalesce(list_contains(CAST($codes AS VARCHAR[]), status), FALSE) AS is_default,
           coalesce(balance <= $paid_off, FALSE) AS is_closed
    FROM panel
    WHERE loan_id IS NOT NULL
)"""

_FLAGS = f"""
{_FLAGGED},
default_months AS (
    SELECT loan_id, month_idx,
           lag(month_idx) OVER (PARTITION BY loan_id ORDER BY month_idx) AS prior_default_idx
    FROM flagged
    WHERE is_default AND month_idx <= $as_of
),
default_starts AS (
    -- a default month starts a new default when none came before it, or the last one was a cure period or
    -- more before the previous month-end (the at-risk rule of loan_months); with no cure period only the first
    SELECT loan_id, max(month_idx) AS default_start_month_idx
    FROM default_months
    WHERE prior_default_idx IS NULL OR coalesce(month_idx - 1 - prior_default_idx >= $cure, FALSE)
    GROUP BY loan_id
),
onsets AS (
    -- the delinquency before that default: the last month up to its start under 30 days past due (no
    -- instalment a whole month overdue; common practice) is the last one paid, and its balance the exposure
    SELECT f.loan_id, max(f.month_idx) AS paid_month_idx, arg_max(f.balance, f.month_idx) AS balance_at_onset
    FROM flagged AS f
    JOIN default_starts AS ds USING (loan_id)
    WHERE f.month_idx <= ds.default_start_month_idx AND coalesce(f.days_past_due, 0) < 30
    GROUP BY f.loan_id
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
           count(*) FILTER (WHERE month_idx = $as_of) > 0 AS on_book_at_as_of,
           -- the staging's arrears history: the last month at or past the backstop, or in default
           max(month_idx) FILTER (
               WHERE month_idx <= $as_of AND (is_default OR coalesce(days_past_due >= $backstop, FALSE))
           ) AS last_arrears_idx,
           max(month_idx) FILTER (WHERE is_default AND month_idx <= $as_of) AS last_default_idx,
           coalesce(bool_or(is_default) FILTER (WHERE month_idx = $as_of), FALSE) AS default_condition_at_as_of
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
           l.term, ds.default_start_month_idx,
           ds.default_start_month_idx - os.paid_month_idx AS months_in_arrears_at_default, os.balance_at_onset
    FROM per_loan AS p
    LEFT JOIN (SELECT loan_id, any_value(term) AS term FROM loans GROUP BY loan_id) AS l USING (loan_id)
    LEFT JOIN default_starts AS ds USING (loan_id)
    LEFT JOIN onsets AS os USING (loan_id)
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

def _origin_sql(n_starts: int) -> str:
    if n_starts == 0:
        return "0"  # one state before default: every month starts in it
    # the state at the end of the previous month; a loan's first month on book starts current
    return (
        "coalesce(lag(arrears_state) OVER (PARTITION BY loan_id ORDER BY month_idx),\n"
        "                    CASE WHEN age <= 1 THEN 0 END)"
    )


def loan_months_sql(n_starts: int) -> str:
    """The SQL creating ``loan_months`` with ``n_starts`` arrears states besides current.

    One pass over each loan's panel rows in month order: the origin state is the previous row's state,
    the loan is at risk unless the previous month was in default (a default less than ``$cure`` months
    back; with no cure period, any default), and its rows stop at its closure.
    """
    return f"""
CREATE OR REPLACE TABLE loan_months AS
WITH {_FLAGGED},
with_state AS (
    SELECT f.*, l.term, {arrears_state_sql("f.days_past_due", n_starts)} AS arrears_state
    FROM flagged AS f
    LEFT JOIN (SELECT loan_id, any_value(term) AS term FROM loans GROUP BY loan_id) AS l USING (loan_id)
),
walked AS (
    SELECT *,
           min(CASE WHEN is_closed THEN month_idx END) OVER (
               PARTITION BY loan_id ORDER BY month_idx ROWS BETWEEN UNBOUNDED PRECEDING AND UNBOUNDED FOLLOWING
           ) AS closed_idx,
           max(CASE WHEN is_default THEN month_idx END) OVER (
               PARTITION BY loan_id ORDER BY month_idx ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
           ) AS prior_default_idx,
           {_origin_sql(n_starts)} AS origin_state
    FROM with_state
),
risk_set AS (
    SELECT *,
           CASE WHEN is_default THEN {OUTCOME_DEFAULT}
                -- a closure before the contractual term is a prepayment; at or after it, maturity
                WHEN month_idx = closed_idx AND coalesce(age < term, TRUE) THEN {OUTCOME_PREPAY}
                ELSE {OUTCOME_CONTINUE} END AS outcome
    FROM walked
    WHERE (closed_idx IS NULL OR month_idx <= closed_idx)
      -- at risk: no default yet, or the last one at least $cure months before the previous month-end
      AND (prior_default_idx IS NULL OR coalesce(month_idx - 1 - prior_default_idx >= $cure, FALSE))
)
SELECT loan_id, CAST(month_idx AS INTEGER) AS month_idx, CAST(age AS INTEGER) AS age,
       CAST(outcome AS TINYINT) AS outcome,
       CAST(origin_state AS TINYINT) AS origin_state,
       CAST(CASE WHEN origin_state IS NULL THEN NULL
                 WHEN outcome <> {OUTCOME_CONTINUE} THEN outcome
                 WHEN arrears_state = origin_state THEN 0
                 ELSE {DESTINATION_MOVE} + arrears_state END AS TINYINT) AS destination,
       CAST(prior_default_idx IS NOT NULL AS TINYINT) AS previously_defaulted
FROM risk_set
ORDER BY loan_id, month_idx
"""

TRANSITION_COUNTS_SQL = """
SELECT month_idx, origin_state, destination, count(*) AS loan_months
FROM loan_months
WHERE origin_state IS NOT NULL
GROUP BY month_idx, origin_state, destination
ORDER BY month_idx, origin_state, destination
"""
"""Observed transitions: loan-months by calendar month, origin state and destination (small)."""

DEFAULT_ROUTES_SQL = f"""
SELECT count(*) AS defaults,
       coalesce(sum(CASE WHEN p.days_past_due >= $dpd THEN 1 ELSE 0 END), 0) AS on_days_past_due
FROM loan_months AS m
JOIN panel AS p ON p.loan_id = m.loan_id AND p.month_idx = m.month_idx
WHERE m.outcome = {OUTCOME_DEFAULT} AND m.month_idx BETWEEN $first AND $last
"""
"""Default events in months ``$first`` to ``$last``, and how many met the days-past-due threshold (the rest
defaulted on a status code alone): the routes into default of the exposure at default."""


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
       -- in default from the first default until the cure period runs out: the last month meeting a default
       -- condition is less than $cure months back (with no cure period default is absorbing)
       on_book_at_as_of AND is_default_event AND event_month_idx <= $as_of
           AND coalesce($as_of - last_default_idx < $cure, TRUE) AS in_default_at_as_of,
       on_book_at_as_of AND is_default_event AND event_month_idx <= $as_of
           AND coalesce($as_of - last_default_idx < $cure, FALSE) AND NOT default_condition_at_as_of
           AS in_cure_period_at_as_of,
       CAST(days_past_due_at_as_of AS INTEGER) AS days_past_due_at_as_of,
       CAST(balance_at_as_of AS DOUBLE) AS balance_at_as_of,
       CAST(last_arrears_idx AS INTEGER) AS last_arrears_month_idx,
       CAST(default_start_month_idx AS INTEGER) AS default_start_month_idx,
       CAST(months_in_arrears_at_default AS INTEGER) AS months_in_arrears_at_default,
       CAST(balance_at_onset AS DOUBLE) AS balance_at_onset
FROM labelled
ORDER BY loan_id
"""


_BOOK_SQL = """
    SELECT l.*,
           o.last_age AS age,
           o.balance_at_as_of AS balance,
           o.days_past_due_at_as_of AS days_past_due,
           o.in_default_at_as_of AS in_default,
           o.in_cure_period_at_as_of AS in_cure_period,
           -- a loan at risk again after a cured default
           CAST(o.event = 'default' AND o.event_month_idx <= $as_of AND NOT o.in_default_at_as_of AS TINYINT)
               AS previously_defaulted,
           CAST($as_of - o.last_arrears_month_idx AS INTEGER) AS months_since_arrears,
           -- months since the default the loan is in began (0 in its first month); NULL when not in default
           CAST(CASE WHEN o.in_default_at_as_of THEN $as_of - o.default_start_month_idx END AS INTEGER)
               AS months_in_default,
           -- the delinquency before it: months from the last month paid to the default, and that month's balance
           CAST(CASE WHEN o.in_default_at_as_of THEN o.months_in_arrears_at_default END AS INTEGER)
               AS months_in_arrears_at_default,
           CAST(CASE WHEN o.in_default_at_as_of THEN o.balance_at_onset END AS DOUBLE) AS balance_at_onset,
           CAST({arrears_state} AS TINYINT) AS arrears_state,
           {segment} AS segment
    FROM loan_outcomes AS o
    JOIN loans AS l USING (loan_id)
    WHERE o.last_month_idx = $as_of
      AND o.event IN ('default', 'censored')
      AND o.balance_at_as_of > $paid_off
    ORDER BY loan_id
"""


def book_sql(segment: str, n_starts: int) -> str:
    """The book at the reporting month (both engines): ``segment`` is the segment expression.

    ``arrears_state`` is the transient state of the reporting month's days past due (read
    ``in_default`` first: a loan in default is in the default state whatever its days past due).
    """
    return _BOOK_SQL.format(segment=segment, arrears_state=arrears_state_sql("o.days_past_due_at_as_of", n_starts))


def panel_history_sql(columns) -> str:
    """The panel's values of ``columns`` for every loan in months ``$first`` to ``$last`` (small: a few months)."""
    from ..sql import quote_ident

    cols = ", ".join(quote_ident(c) for c in columns)
    return f"SELECT loan_id, month_idx, {cols} FROM panel WHERE month_idx BETWEEN $first AND $last ORDER BY loan_id, month_idx"


def event_params(cfg, sql: str) -> dict:
    """The ``$``-parameters of the event and book SQL that ``sql`` uses, from the config."""
    dd = cfg.default_definition
    params = {
        "dpd": dd.days_past_due,
        "codes": list(dd.status_codes),
        "paid_off": float(cfg.events.paid_off_balance),
        "as_of": int(cfg.as_of),
        "backstop": int(cfg.staging.dpd_backstop),
        "cure": None if dd.cure_months is None else int(dd.cure_months),
        **{f"arrears_{i}": int(v) for i, v in enumerate(cfg.arrears.starts, start=1)},
    }
    return {k: v for k, v in params.items() if f"${k}" in sql}
