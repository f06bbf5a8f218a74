"""The demo book: a simulator of a fictional lender's loan-month history with known true hazards."""

from ._behaviour import (
    ARREARS_COEFFICIENTS,
    ArrearsBehaviour,
    arrears_behaviour,
)
from ._simulate import (
    DEFAULT_MIN_AGE,
    LENDER,
    OUTPUT_FILES,
    TRUE_COEFFICIENTS,
    BookChunk,
    LogitHazard,
    PSAHazard,
    SimulatedBook,
    book_truth,
    make_macro,
    psa_hazard,
    scheduled_balance,
    simulate_book,
    simulate_small_book,
    true_hazard,
    write_demo_book,
)

__all__ = [
    "ARREARS_COEFFICIENTS", "ArrearsBehaviour", "arrears_behaviour", "DEFAULT_MIN_AGE", "LENDER", "OUTPUT_FILES", "TRUE_COEFFICIENTS", "BookChunk", "LogitHazard", "PSAHazard", "SimulatedBook",
    "book_truth", "make_macro", "psa_hazard", "scheduled_balance", "simulate_book", "simulate_small_book", "true_hazard",
    "write_demo_book",
]  # fmt: skip
