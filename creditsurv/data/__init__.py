"""Stage 2, the data: what the inputs must hold, the data checks and the event rules.

Written once as SQL text and plain Python that every engine runs (see
:mod:`creditsurv.engines`): an engine registers the input files under the
internal column names (:mod:`._inputs`), runs the checks (:mod:`._checks`) and
labels what happened to each loan (:mod:`._events`).
"""

from ._checks import (
    CHECK_COLUMNS,
    CHECKS,
    Check,
    PlannedCheck,
    check_frame,
    check_severity,
    format_checks,
    plan_checks,
    raise_for_errors,
)
from ._events import (
    ABSORBING_STATES,
    CAUSE_CODES,
    DEFAULT_ROUTES_SQL,
    DESTINATION_MOVE,
    EVENTS,
    LOAN_OUTCOMES_SQL,
    OUTCOME_CONTINUE,
    OUTCOME_DEFAULT,
    OUTCOME_PREPAY,
    PREVIOUSLY_DEFAULTED,
    TRANSITION_COUNTS_SQL,
    arrears_state_sql,
    book_sql,
    event_params,
    loan_months_sql,
    panel_history_sql,
)
from ._inputs import (
    LOAN_COLUMNS,
    MACRO_COLUMNS,
    PANEL_COLUMNS,
    Source,
    file_format,
    input_sources,
    macro_series_used,
    passthrough_columns,
    problem_text,
    resolve_inputs,
)
from ._preflight import preflight_problems, raise_preflight, same_month_panel_problem
from ._transitions import (
    end_states,
    state_distribution,
    state_names,
    transition_matrix,
    transition_table,
)

__all__ = [
    "ABSORBING_STATES", "CAUSE_CODES", "CHECKS", "DEFAULT_ROUTES_SQL", "CHECK_COLUMNS", "Check", "DESTINATION_MOVE", "EVENTS", "LOAN_COLUMNS",
    "TRANSITION_COUNTS_SQL", "arrears_state_sql", "book_sql", "loan_months_sql", "panel_history_sql",
    "LOAN_OUTCOMES_SQL", "MACRO_COLUMNS", "OUTCOME_CONTINUE", "OUTCOME_DEFAULT", "OUTCOME_PREPAY", "PREVIOUSLY_DEFAULTED",
    "PANEL_COLUMNS", "PlannedCheck", "Source", "check_frame", "check_severity", "end_states", "event_params",
    "file_format", "format_checks", "input_sources", "macro_series_used", "passthrough_columns", "plan_checks",
    "preflight_problems", "problem_text", "raise_for_errors", "raise_preflight", "resolve_inputs", "same_month_panel_problem", "state_distribution", "state_names", "transition_matrix", "transition_table",
]  # fmt: skip
