"""Validation: pure statistics on arrays (``_statistics``) apart from the pack that gathers the data and runs them (``_pack``)."""

from ._pack import (
    PACK_COLUMNS,
    ValidationPack,
    input_stability,
    transition_backtest,
    validation_pack,
)
from ._statistics import (
    aalen_johansen,
    aalen_johansen_states,
    age_band,
    backtest,
    binomial_interval,
    calibration,
    coefficient_changes,
    discrimination,
    model_vs_nonparametric,
    psi,
    psi_flag,
    twelve_month_cohort,
)

__all__ = [
    "PACK_COLUMNS", "ValidationPack", "aalen_johansen", "aalen_johansen_states", "age_band", "backtest", "binomial_interval", "calibration",
    "coefficient_changes", "discrimination", "input_stability", "model_vs_nonparametric", "psi", "psi_flag",
    "transition_backtest", "twelve_month_cohort", "validation_pack",
]  # fmt: skip
