"""Stage 5, the loss: EAD, LGD, discounting, stage allocation and the ECL of every loan."""

from ._ecl import (
    EclResult,
    allocate_stages,
    collateral_lgd,
    discount_factors,
    expected_credit_loss,
    segment_summary,
)

__all__ = ["EclResult", "allocate_stages", "collateral_lgd", "discount_factors", "expected_credit_loss", "segment_summary"]
