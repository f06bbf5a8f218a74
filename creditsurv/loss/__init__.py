"""Stage 5, the loss: EAD, LGD, discounting, stage allocation and the ECL of every loan."""

from ._combine import combine_partitions, expected_credit_loss_by_partition
from ._ecl import (
    BALANCE_AT_ONSET,
    MONTHS_IN_ARREARS_AT_DEFAULT,
    MONTHS_IN_DEFAULT,
    SICR_HISTORY,
    SICR_MULTIPLIERS,
    STAGE_REASONS,
    STAGING_COLUMNS,
    EclResult,
    Stages,
    allocate_stages,
    collateral_lgd,
    default_routes,
    defaulted_exposure,
    discount_factors,
    expected_credit_loss,
    exposure_at_default,
    lgd_of_recovery,
    loans_in_default,
    loss_at_default,
    low_credit_risk,
    months_to_sale,
    segment_summary,
    sicr_sensitivity,
    staging_scenario,
)

__all__ = [
    "BALANCE_AT_ONSET", "MONTHS_IN_ARREARS_AT_DEFAULT", "default_routes", "defaulted_exposure", "exposure_at_default",
    "MONTHS_IN_DEFAULT", "SICR_HISTORY", "SICR_MULTIPLIERS", "STAGE_REASONS", "STAGING_COLUMNS", "EclResult", "Stages", "allocate_stages", "collateral_lgd", "combine_partitions", "discount_factors",
    "expected_credit_loss", "expected_credit_loss_by_partition", "months_to_sale", "segment_summary", "sicr_sensitivity", "staging_scenario", "low_credit_risk", "loans_in_default", "lgd_of_recovery", "loss_at_default",
]  # fmt: skip
