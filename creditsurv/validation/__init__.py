"""Validation: pure statistics on arrays (``_statistics``) and their verdicts (``_verdicts``) apart from the pack
that gathers the data and runs them (``_pack``)."""

from ._pack import (
    PACK_COLUMNS,
    ValidationPack,
    input_stability,
    out_of_time_in_sample,
    transition_backtest,
    validation_pack,
)
from ._statistics import (
    ASSET_CORRELATION,
    aalen_johansen,
    aalen_johansen_states,
    age_band,
    backtest,
    binomial_interval,
    calibration,
    coefficient_changes,
    discrimination,
    model_vs_nonparametric,
    one_factor_variance,
    psi,
    twelve_month_cohort,
)
from ._verdicts import (
    AREAS,
    EXPECTED_DRIFT,
    FAIL,
    PASS,
    THRESHOLDS,
    VERDICT_COLUMNS,
    WATCH,
    area_verdicts,
    auc_verdict,
    moves_with_calendar,
    p_value_verdict,
    psi_verdict,
    rule_text,
    share_outside_verdict,
    two_sided_p_value,
    verdict_table,
    worst_verdict,
)

__all__ = [
    "ASSET_CORRELATION", "one_factor_variance", "PACK_COLUMNS", "ValidationPack", "aalen_johansen",
    "aalen_johansen_states", "age_band", "backtest", "binomial_interval", "calibration", "coefficient_changes",
    "discrimination", "input_stability", "out_of_time_in_sample", "model_vs_nonparametric", "psi",
    "transition_backtest", "twelve_month_cohort", "validation_pack",
    # verdicts
    "AREAS", "EXPECTED_DRIFT", "FAIL", "PASS", "THRESHOLDS", "VERDICT_COLUMNS", "WATCH", "area_verdicts",
    "auc_verdict", "moves_with_calendar", "p_value_verdict", "psi_verdict", "rule_text", "share_outside_verdict",
    "two_sided_p_value", "verdict_table", "worst_verdict",
]  # fmt: skip
