"""Validation: pure statistics on arrays (``_statistics``) apart from the pack that gathers the data and runs them (``_pack``)."""

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
    EXPECTED_DRIFT,
    aalen_johansen,
    aalen_johansen_states,
    age_band,
    backtest,
    binomial_interval,
    calibration,
    coefficient_changes,
    discrimination,
    model_vs_nonparametric,
    moves_with_calendar,
    one_factor_variance,
    psi,
    psi_flag,
    twelve_month_cohort,
)

__all__ = [
    "ASSET_CORRELATION", "EXPECTED_DRIFT", "one_factor_variance", "PACK_COLUMNS", "ValidationPack", "moves_with_calendar", "aalen_johansen", "aalen_johansen_states", "age_band", "backtest", "binomial_interval", "calibration",
    "coefficient_changes", "discrimination", "input_stability", "out_of_time_in_sample", "model_vs_nonparametric", "psi", "psi_flag",
    "transition_backtest", "twelve_month_cohort", "validation_pack",
]  # fmt: skip
